#pragma once
// Bounded-memory file access for the checkpoint readers: positioned reads into
// caller buffers (no whole-file mapping), and scratch files for data that must
// be decoded before it can be read at random (deflated zip members, varint
// protobuf fields). Errors name the file.
#include <cstdint>
#include <memory>
#include <mutex>
#include <string>
#include <vector>

namespace lobit::io {

// A read-only file. read_at is safe to call from several threads at once.
class RandomAccessFile {
 public:
  // Throws lobit::Error (usage) naming the path when it cannot be opened.
  explicit RandomAccessFile(std::string path);
  ~RandomAccessFile();
  RandomAccessFile(const RandomAccessFile&) = delete;
  RandomAccessFile& operator=(const RandomAccessFile&) = delete;

  const std::string& path() const { return path_; }
  std::uint64_t size() const { return size_; }
  // Reads exactly n bytes at offset; throws (usage, "file is truncated") when the
  // range passes the end of the file, (internal) on an I/O error.
  void read_at(std::uint64_t offset, void* out, std::uint64_t n) const;

 private:
  std::string path_;
  int fd_ = -1;
  std::uint64_t size_ = 0;
};

// An anonymous temporary file (unlinked at once, so nothing is left behind even
// on a crash): appended to by one writer, then read like a RandomAccessFile.
class ScratchFile {
 public:
  ScratchFile();
  ~ScratchFile();
  ScratchFile(const ScratchFile&) = delete;
  ScratchFile& operator=(const ScratchFile&) = delete;

  // Appends n bytes; returns the offset they were written at.
  std::uint64_t append(const void* data, std::uint64_t n);
  std::uint64_t size() const;
  void read_at(std::uint64_t offset, void* out, std::uint64_t n) const;

 private:
  int fd_ = -1;
  mutable std::mutex mu_;
  std::uint64_t size_ = 0;
};

// Whole-file writing that never leaves a partial file under the final name: data goes
// to PATH.tmp-XXXXXX beside it, commit() syncs and renames; destruction without
// commit() removes the temporary. Throws lobit::Error (usage) naming the path when the
// folder cannot be written.
class AtomicFileWriter {
 public:
  explicit AtomicFileWriter(std::string path);
  ~AtomicFileWriter();
  AtomicFileWriter(const AtomicFileWriter&) = delete;
  AtomicFileWriter& operator=(const AtomicFileWriter&) = delete;

  void write(const void* data, std::uint64_t n);
  std::uint64_t written() const { return written_; }
  void commit();
  const std::string& path() const { return path_; }

 private:
  void flush();
  std::string path_, tmp_;
  int fd_ = -1;
  std::uint64_t written_ = 0;
  bool committed_ = false;
  std::vector<unsigned char> buf_;  // small writes are gathered into 1 MiB system calls
};

// An AtomicFileWriter for a header followed by a known number of data bytes (the
// streaming safetensors and .npy writers): writing past them, or committing short of
// them, is an internal error that names the file and `what` the bytes belong to ("the
// plan", "the array").
class PlannedFileWriter {
 public:
  PlannedFileWriter(std::string path, const std::string& header, std::uint64_t data_bytes, std::string what);
  void write(const void* data, std::uint64_t nbytes);
  void commit();

 private:
  AtomicFileWriter out_;
  std::uint64_t data_bytes_, written_ = 0;
  std::string what_;
};

}  // namespace lobit::io
