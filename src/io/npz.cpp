// .npz: a zip archive of NAME.npy members, opened with libzip (which checks the archive's
// directories against each other). Two ways to the elements:
//   stored members are read in place: their data offset comes from the zip's own
//   directory (read here, cross-checked with libzip), so a multi-gigabyte np.savez file
//   costs no copy;
//   compressed members are decompressed once, on first use, into a scratch file
//   (libzip checks the CRC at the end of the stream).
// Listing reads only each member's header (at most npy_max_header_bytes).
#include <fmt/format.h>
#include <zip.h>

#include <algorithm>
#include <cstring>
#include <mutex>
#include <unordered_set>

#include "lobit/error.hpp"
#include "lobit/io/numpy.hpp"

namespace lobit::io {
namespace {


const char* kNpzHint = "an .npz file is a zip archive of NAME.npy arrays; it may be truncated or corrupt";

std::uint64_t le(const unsigned char* p, int n) {
  std::uint64_t v = 0;
  for (int i = n - 1; i >= 0; --i) v = (v << 8) | p[i];
  return v;
}

struct ZipCloser {
  void operator()(zip_t* z) const { zip_discard(z); }
};
struct ZipFileCloser {
  void operator()(zip_file_t* f) const { zip_fclose(f); }
};

// Where each member's local file header starts, from the central directory (zip64
// included), with the raw names to cross-check against libzip's view. Returns an empty
// vector when the directory cannot be walked; the caller then decompresses instead.
struct DirEntry {
  std::string raw_name;
  std::uint64_t local_offset;
  std::uint64_t comp_size;
  int method;
};
std::vector<DirEntry> read_central_directory(const RandomAccessFile& f, std::uint64_t expected_entries) {
  const std::uint64_t size = f.size();
  if (size < 22) return {};
  // The end record is the last 22 bytes plus a comment of up to 65535 bytes.
  const std::uint64_t tail_len = std::min<std::uint64_t>(size, 22 + 65535);
  std::vector<unsigned char> tail(static_cast<std::size_t>(tail_len));
  f.read_at(size - tail_len, tail.data(), tail_len);
  std::optional<std::size_t> eocd;
  for (std::size_t i = tail.size() - 22 + 1; i-- > 0;) {
    if (le(&tail[i], 4) == 0x06054b50 && i + 22 + le(&tail[i + 20], 2) == tail.size()) {
      eocd = i;
      break;
    }
  }
  if (!eocd) return {};
  const unsigned char* e = &tail[*eocd];
  std::uint64_t entries = le(e + 10, 2), cd_size = le(e + 12, 4), cd_offset = le(e + 16, 4);
  if (entries == 0xffff || cd_size == 0xffffffff || cd_offset == 0xffffffff) {
    const std::uint64_t eocd_pos = size - tail_len + *eocd;
    if (eocd_pos < 20) return {};
    unsigned char loc[20];
    f.read_at(eocd_pos - 20, loc, 20);
    if (le(loc, 4) != 0x07064b50) return {};
    const std::uint64_t z64 = le(loc + 8, 8);
    if (z64 > size || size - z64 < 56) return {};
    unsigned char rec[56];
    f.read_at(z64, rec, 56);
    if (le(rec, 4) != 0x06064b50) return {};
    entries = le(rec + 32, 8);
    cd_size = le(rec + 40, 8);
    cd_offset = le(rec + 48, 8);
  }
  if (entries != expected_entries || cd_offset > size || cd_size > size - cd_offset) return {};

  std::vector<DirEntry> out;
  out.reserve(static_cast<std::size_t>(entries));
  std::uint64_t pos = cd_offset;
  const std::uint64_t end = cd_offset + cd_size;
  std::vector<unsigned char> var;
  for (std::uint64_t k = 0; k < entries; ++k) {
    if (end - pos < 46) return {};
    unsigned char h[46];
    f.read_at(pos, h, 46);
    if (le(h, 4) != 0x02014b50) return {};
    const std::uint64_t name_len = le(h + 28, 2), extra_len = le(h + 30, 2), comment_len = le(h + 32, 2);
    if (end - pos - 46 < name_len + extra_len + comment_len) return {};
    var.resize(static_cast<std::size_t>(name_len + extra_len));
    f.read_at(pos + 46, var.data(), var.size());
    DirEntry d;
    d.raw_name.assign(reinterpret_cast<const char*>(var.data()), static_cast<std::size_t>(name_len));
    d.method = static_cast<int>(le(h + 10, 2));
    d.comp_size = le(h + 20, 4);
    std::uint64_t usize = le(h + 24, 4);
    d.local_offset = le(h + 42, 4);
    // Zip64 extra field: the 64-bit values of the fields that hold 0xffffffff, in order.
    for (std::size_t x = static_cast<std::size_t>(name_len); x + 4 <= var.size();) {
      const std::uint64_t id = le(&var[x], 2), len = le(&var[x + 2], 2);
      if (x + 4 + len > var.size()) return {};
      if (id == 0x0001) {
        std::size_t p = x + 4;
        auto take = [&](std::uint64_t& field) {
          if (field != 0xffffffff) return true;
          if (p + 8 > x + 4 + len) return false;
          field = le(&var[p], 8);
          p += 8;
          return true;
        };
        if (!take(usize) || !take(d.comp_size) || !take(d.local_offset)) return {};
      }
      x += 4 + static_cast<std::size_t>(len);
    }
    out.push_back(std::move(d));
    pos += 46 + name_len + extra_len + comment_len;
  }
  return out;
}

struct Member {
  zip_uint64_t index;
  std::string member;        // the member's name in the archive
  bool in_place = false;     // stored: read from the archive file at data_offset
  std::uint64_t data_offset = 0;  // in place: absolute offset of the first element
  std::uint64_t prefix = 0;       // the .npy header's length
  std::uint64_t size = 0;         // the member's uncompressed size
};

class NpzCheckpoint final : public Checkpoint {
 public:
  explicit NpzCheckpoint(std::string path) : path_(std::move(path)) {
    file_ = std::make_shared<const RandomAccessFile>(path_);
    int err = 0;
    zip_.reset(zip_open(path_.c_str(), ZIP_RDONLY | ZIP_CHECKCONS, &err));
    if (!zip_) {
      zip_error_t ze;
      zip_error_init_with_code(&ze, err);
      const std::string text = zip_error_strerror(&ze);
      zip_error_fini(&ze);
      throw usage_error(fmt::format("not a readable zip archive: {}", text), path_, kNpzHint);
    }
    const zip_int64_t n = zip_get_num_entries(zip_.get(), 0);
    if (n < 0) throw usage_error("the zip directory cannot be read", path_, kNpzHint);
    std::vector<DirEntry> dir;
    bool dir_read = false;
    std::unordered_set<std::string> names;
    std::vector<unsigned char> head(npy_max_header_bytes);
    for (zip_uint64_t i = 0; i < static_cast<zip_uint64_t>(n); ++i) {
      zip_stat_t st;
      zip_stat_init(&st);
      if (zip_stat_index(zip_.get(), i, 0, &st) != 0 || !(st.valid & ZIP_STAT_NAME) || !(st.valid & ZIP_STAT_SIZE))
        throw usage_error(fmt::format("member {} of the zip directory cannot be read: {}", i,
                                      zip_strerror(zip_.get())),
                          path_, kNpzHint);
      Member m;
      m.index = i;
      m.member = st.name;
      m.size = st.size;
      const std::string where = fmt::format("{}, member {}", path_, quoted_name(m.member));
      if (m.member.size() <= 4 || m.member.compare(m.member.size() - 4, 4, ".npy") != 0)
        throw usage_error("is not a .npy array (its name does not end in .npy)", where,
                          "an .npz archive holds only NAME.npy members");
      if ((st.valid & ZIP_STAT_ENCRYPTION_METHOD) && st.encryption_method != ZIP_EM_NONE)
        throw usage_error("is encrypted", where, "lobit reads unencrypted archives only");
      const bool stored = (st.valid & ZIP_STAT_COMP_METHOD) && st.comp_method == ZIP_CM_STORE;
      if (stored && !dir_read) {
        dir = read_central_directory(*file_, static_cast<std::uint64_t>(n));
        dir_read = true;
      }
      if (stored) locate_in_place(m, st, dir, where);

      // The header, from at most the first npy_max_header_bytes of the member.
      const std::size_t want = static_cast<std::size_t>(std::min<std::uint64_t>(m.size, head.size()));
      if (m.in_place) file_->read_at(m.data_offset, head.data(), want);
      else read_member_start(m, head.data(), want, where);
      if (want < 6 || !looks_like_npy(head.data(), want))
        throw usage_error("has no .npy magic (\\x93NUMPY) at its start", where,
                          "an .npz archive holds only .npy arrays");
      const auto prefix = npy_prefix_bytes(head.data(), want, where);
      if (!prefix || *prefix > want)
        throw usage_error(fmt::format("the member has {} bytes and ends inside its .npy header", m.size), where,
                          "the archive is truncated or corrupt");
      const NpyHeader h = parse_npy_header(head.data(), want, where);
      m.prefix = h.data_offset;

      TensorInfo t;
      t.name = m.member.substr(0, m.member.size() - 4);
      t.file = path_;
      t.dtype = h.dtype;
      t.shape = h.shape;
      t.big_endian = h.big_endian;
      t.fortran_order = h.fortran_order;
      t.origin = m.in_place ? "npz member (stored, read in place)" : "npz member (compressed, decompressed on first read)";
      if (m.size - m.prefix != h.data_bytes)
        throw usage_error(fmt::format("the member holds {} bytes of data but {} {} needs {}", m.size - m.prefix,
                                      dtype_name(h.dtype), t.shape_text(), h.data_bytes),
                          where, "the member's header does not describe its data; the archive may be corrupt");
      if (!names.insert(t.name).second)
        throw usage_error(fmt::format("tensor {} appears twice", quoted_name(t.name)), where,
                          "the archive has two members of the same name");
      if (m.in_place) m.data_offset += m.prefix;
      tensors_.push_back(std::move(t));
      members_.push_back(std::move(m));
    }
    cached_.assign(members_.size(), std::nullopt);
  }

  const std::string& path() const override { return path_; }
  std::string_view kind() const override { return "npz"; }

 protected:
  Extent locate(std::size_t i) const override {
    const Member& m = members_.at(i);
    if (m.in_place) return Extent{file_, nullptr, m.data_offset};
    std::lock_guard lock(mu_);
    if (!cached_[i]) cached_[i] = decompress(m);
    return Extent{nullptr, scratch_, *cached_[i]};
  }

 private:
  // A stored member's data offset: the central directory gives the local header, whose
  // name and extra field lengths give the data. Anything unexpected leaves the member to
  // the decompressing path, which libzip checks.
  void locate_in_place(Member& m, const zip_stat_t& st, const std::vector<DirEntry>& dir, const std::string&) const {
    if (m.index >= dir.size() || !(st.valid & ZIP_STAT_COMP_SIZE) || st.comp_size != st.size) return;
    const DirEntry& d = dir[static_cast<std::size_t>(m.index)];
    const char* raw = zip_get_name(zip_.get(), m.index, ZIP_FL_ENC_RAW);
    if (!raw || d.raw_name != raw || d.method != 0 || d.comp_size != st.comp_size) return;
    if (d.local_offset > file_->size() || file_->size() - d.local_offset < 30) return;
    unsigned char h[30];
    file_->read_at(d.local_offset, h, 30);
    if (le(h, 4) != 0x04034b50) return;
    const std::uint64_t data = d.local_offset + 30 + le(h + 26, 2) + le(h + 28, 2);
    if (data > file_->size() || file_->size() - data < st.size) return;
    m.in_place = true;
    m.data_offset = data;
  }

  zip_file_t* open_member(const Member& m, const std::string& where) const {
    zip_file_t* f = zip_fopen_index(zip_.get(), m.index, 0);
    if (!f)
      throw usage_error(fmt::format("cannot be read: {}", zip_strerror(zip_.get())), where,
                        "lobit reads stored and deflated members (and the other methods libzip supports)");
    return f;
  }

  // Reads exactly n bytes of the member's start (n <= its size).
  void read_member_start(const Member& m, unsigned char* out, std::size_t n, const std::string& where) const {
    std::unique_ptr<zip_file_t, ZipFileCloser> f(open_member(m, where));
    std::size_t got = 0;
    while (got < n) {
      const zip_int64_t r = zip_fread(f.get(), out + got, n - got);
      if (r < 0)
        throw usage_error(fmt::format("is corrupt: {}", zip_file_strerror(f.get())), where, kNpzHint);
      if (r == 0)
        throw usage_error(fmt::format("ends after {} bytes, before the {} its directory entry gives", got, m.size),
                          where, kNpzHint);
      got += static_cast<std::size_t>(r);
    }
  }

  // Decompresses a member's elements into the scratch file (mu_ held); returns their offset.
  std::uint64_t decompress(const Member& m) const {
    const std::string where = fmt::format("{}, member {}", path_, quoted_name(m.member));
    if (!scratch_) scratch_ = std::make_shared<ScratchFile>();
    std::unique_ptr<zip_file_t, ZipFileCloser> f(open_member(m, where));
    std::vector<unsigned char> buf(1u << 20);
    std::uint64_t pos = 0;  // bytes of the member read so far
    std::optional<std::uint64_t> first;
    for (;;) {
      const zip_int64_t r = zip_fread(f.get(), buf.data(), buf.size());
      if (r < 0) throw usage_error(fmt::format("is corrupt: {}", zip_file_strerror(f.get())), where, kNpzHint);
      if (r == 0) break;
      const auto got = static_cast<std::uint64_t>(r);
      if (got > m.size - pos)
        throw usage_error(fmt::format("is corrupt: it decompresses to more than the {} bytes its directory entry "
                                      "gives",
                                      m.size),
                          where, kNpzHint);
      // Skip the header; append the elements.
      const std::uint64_t skip = pos < m.prefix ? std::min(got, m.prefix - pos) : 0;
      if (got > skip) {
        const std::uint64_t at = scratch_->append(buf.data() + skip, got - skip);
        if (!first) first = at;
      }
      pos += got;
    }
    if (pos != m.size)
      throw usage_error(fmt::format("is corrupt: it decompresses to {} bytes, not the {} its directory entry gives",
                                    pos, m.size),
                        where, kNpzHint);
    return first ? *first : scratch_->size();
  }

  std::string path_;
  std::shared_ptr<const RandomAccessFile> file_;
  std::unique_ptr<zip_t, ZipCloser> zip_;
  std::vector<Member> members_;
  mutable std::mutex mu_;  // guards zip_, scratch_ and cached_ (libzip is not thread-safe)
  mutable std::shared_ptr<ScratchFile> scratch_;
  mutable std::vector<std::optional<std::uint64_t>> cached_;
};

}  // namespace

std::unique_ptr<Checkpoint> open_npz(const std::string& path) { return std::make_unique<NpzCheckpoint>(path); }

}  // namespace lobit::io
