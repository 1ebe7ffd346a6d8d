// Positioned reads, scratch files and all-or-nothing writes (POSIX).
#include "lobit/io/file.hpp"

#include <fcntl.h>
#include <sys/stat.h>
#include <unistd.h>

#include <cerrno>
#include <cstdlib>
#include <cstring>
#include <fmt/format.h>
#include <vector>

#include "lobit/error.hpp"

namespace lobit::io {
namespace {

std::string errno_text() { return std::strerror(errno); }

void pread_exact(int fd, std::uint64_t offset, void* out, std::uint64_t n, const std::string& what) {
  auto* p = static_cast<unsigned char*>(out);
  while (n > 0) {
    const std::size_t step = static_cast<std::size_t>(std::min<std::uint64_t>(n, 1u << 30));
    const ssize_t got = ::pread(fd, p, step, static_cast<off_t>(offset));
    if (got < 0) {
      if (errno == EINTR) continue;
      throw Error(Error::Kind::internal, fmt::format("read failed at byte {}: {}", offset, errno_text()), what);
    }
    if (got == 0)
      throw usage_error(fmt::format("the file ends at byte {} in the middle of a read", offset), what,
                        "the file is truncated");
    p += got;
    offset += static_cast<std::uint64_t>(got);
    n -= static_cast<std::uint64_t>(got);
  }
}

void write_all(int fd, const void* data, std::uint64_t n, const std::string& what) {
  const auto* p = static_cast<const unsigned char*>(data);
  while (n > 0) {
    const std::size_t step = static_cast<std::size_t>(std::min<std::uint64_t>(n, 1u << 30));
    const ssize_t put = ::write(fd, p, step);
    if (put < 0) {
      if (errno == EINTR) continue;
      throw usage_error(fmt::format("cannot write: {}", errno_text()), what, "check the free space and permissions");
    }
    p += put;
    n -= static_cast<std::uint64_t>(put);
  }
}

std::string temp_folder() {
  const char* t = std::getenv("TMPDIR");
  return t && *t ? t : "/tmp";
}

}  // namespace

RandomAccessFile::RandomAccessFile(std::string path) : path_(std::move(path)) {
  fd_ = ::open(path_.c_str(), O_RDONLY | O_CLOEXEC);
  if (fd_ < 0) throw usage_error(fmt::format("cannot open: {}", errno_text()), path_, "check the path");
  struct stat st{};
  if (::fstat(fd_, &st) != 0 || !S_ISREG(st.st_mode)) {
    ::close(fd_);
    fd_ = -1;
    throw usage_error("not a regular file", path_, "give the path of a checkpoint file");
  }
  size_ = static_cast<std::uint64_t>(st.st_size);
}

RandomAccessFile::~RandomAccessFile() {
  if (fd_ >= 0) ::close(fd_);
}

void RandomAccessFile::read_at(std::uint64_t offset, void* out, std::uint64_t n) const {
  if (offset > size_ || n > size_ - offset)
    throw usage_error(fmt::format("a read of {} bytes at byte {} passes the end of the file ({} bytes)", n, offset,
                                  size_),
                      path_, "the file is truncated or its header is corrupt");
  pread_exact(fd_, offset, out, n, path_);
}

ScratchFile::ScratchFile() {
  std::string tmpl = temp_folder() + "/lobit-scratch-XXXXXX";
  std::vector<char> name(tmpl.begin(), tmpl.end());
  name.push_back('\0');
  fd_ = ::mkstemp(name.data());
  if (fd_ < 0)
    throw usage_error(fmt::format("cannot create a scratch file in {}: {}", temp_folder(), errno_text()),
                      "scratch file", "set TMPDIR to a writable folder");
  ::unlink(name.data());  // anonymous from now on: removed when closed, even on a crash
}

ScratchFile::~ScratchFile() {
  if (fd_ >= 0) ::close(fd_);
}

std::uint64_t ScratchFile::append(const void* data, std::uint64_t n) {
  std::lock_guard lock(mu_);
  const std::uint64_t at = size_;
  const auto* p = static_cast<const unsigned char*>(data);
  std::uint64_t done = 0;
  while (done < n) {
    const std::size_t step = static_cast<std::size_t>(std::min<std::uint64_t>(n - done, 1u << 30));
    const ssize_t put = ::pwrite(fd_, p + done, step, static_cast<off_t>(at + done));
    if (put < 0) {
      if (errno == EINTR) continue;
      throw usage_error(fmt::format("cannot write a scratch file in {}: {}", temp_folder(), errno_text()),
                        "scratch file", "free space there or set TMPDIR to another folder");
    }
    done += static_cast<std::uint64_t>(put);
  }
  size_ += n;
  return at;
}

std::uint64_t ScratchFile::size() const {
  std::lock_guard lock(mu_);
  return size_;
}

void ScratchFile::read_at(std::uint64_t offset, void* out, std::uint64_t n) const {
  if (offset > size() || n > size() - offset)
    throw Error(Error::Kind::internal, "a read passes the end of the scratch file", "scratch file");
  pread_exact(fd_, offset, out, n, "scratch file");
}

AtomicFileWriter::AtomicFileWriter(std::string path) : path_(std::move(path)) {
  std::string tmpl = path_ + ".tmp-XXXXXX";
  std::vector<char> name(tmpl.begin(), tmpl.end());
  name.push_back('\0');
  fd_ = ::mkstemp(name.data());
  if (fd_ < 0)
    throw usage_error(fmt::format("cannot write here: {}", errno_text()), path_,
                      "check that the folder exists and is writable");
  tmp_ = name.data();
}

AtomicFileWriter::~AtomicFileWriter() {
  if (fd_ >= 0) ::close(fd_);
  if (!committed_ && !tmp_.empty()) ::unlink(tmp_.c_str());
}

void AtomicFileWriter::write(const void* data, std::uint64_t n) {
  if (fd_ < 0) throw Error(Error::Kind::internal, "write after commit", path_);
  constexpr std::size_t cap = 1 << 20;
  if (buf_.size() + n > cap) flush();
  if (n >= cap) {
    write_all(fd_, data, n, path_);
  } else {
    const auto* p = static_cast<const unsigned char*>(data);
    buf_.insert(buf_.end(), p, p + n);
  }
  written_ += n;
}

void AtomicFileWriter::flush() {
  if (!buf_.empty()) write_all(fd_, buf_.data(), buf_.size(), path_);
  buf_.clear();
}

void AtomicFileWriter::commit() {
  if (fd_ < 0) throw Error(Error::Kind::internal, "committed twice", path_);
  flush();
  if (::fchmod(fd_, 0644) != 0 || ::fsync(fd_) != 0)
    throw usage_error(fmt::format("cannot finish writing: {}", errno_text()), path_, "check the free space");
  if (::close(fd_) != 0) {
    fd_ = -1;
    throw usage_error(fmt::format("cannot finish writing: {}", errno_text()), path_, "check the free space");
  }
  fd_ = -1;
  if (::rename(tmp_.c_str(), path_.c_str()) != 0)
    throw usage_error(fmt::format("cannot move the finished file into place: {}", errno_text()), path_,
                      "check the folder's permissions");
  committed_ = true;
}

PlannedFileWriter::PlannedFileWriter(std::string path, const std::string& header, std::uint64_t data_bytes,
                                     std::string what)
    : out_(std::move(path)), data_bytes_(data_bytes), what_(std::move(what)) {
  out_.write(header.data(), header.size());
}

void PlannedFileWriter::write(const void* data, std::uint64_t nbytes) {
  if (nbytes > data_bytes_ - written_)
    throw Error(Error::Kind::internal,
                fmt::format("{} more bytes written than {}'s {}", nbytes - (data_bytes_ - written_), what_, data_bytes_),
                out_.path());
  out_.write(data, nbytes);
  written_ += nbytes;
}

void PlannedFileWriter::commit() {
  if (written_ != data_bytes_)
    throw Error(Error::Kind::internal,
                fmt::format("{} of {}'s {} data bytes were written", written_, what_, data_bytes_), out_.path());
  out_.commit();
}

}  // namespace lobit::io
