// headroom — .npy files: prelude, size checks, atomic writes (see npy.h).
//
// Layout (numpy/lib/format.py, "Format Version 1.0" and "2.0"): 6 magic bytes
// "\x93NUMPY", major and minor version bytes, the header length as a
// little-endian uint16 (1.0) or uint32 (2.0, 3.0), the header, the data.
#include "headroom/npy.h"

#include <unistd.h>

#include <algorithm>
#include <array>
#include <cerrno>
#include <cstring>
#include <new>
#include <stdexcept>
#include <system_error>

#include "headroom/atomic_file.h"
#include "headroom/input_error.h"
#include "headroom/input_file.h"
#include "npy_header.h"

namespace headroom {
namespace {

constexpr std::array<unsigned char, 6> kMagic{0x93, 'N', 'U', 'M', 'P', 'Y'};
// Our headers are under 200 bytes; NumPy itself refuses headers over 10000
// bytes unless told otherwise (numpy.lib.format, max_header_size). A larger
// bound here only guards the allocation.
constexpr std::uint32_t kMaxHeaderBytes = 1u << 20;
constexpr std::size_t kAlign = 64;  // NumPy's ARRAY_ALIGN: data starts on a 64-byte boundary
constexpr const char* kRewriteFix = "write the file with numpy.save or numpy.lib.format.write_array";

struct DescrInfo {
  std::string_view descr;
  std::size_t size;
};
constexpr std::array<DescrInfo, 9> kDescrs{{
    {"<f8", 8}, {"<f4", 4}, {"<f2", 2}, {"<u2", 2}, {"|i1", 1}, {"|u1", 1}, {"|b1", 1}, {"<i4", 4}, {"<i8", 8},
}};

// Where the header is: prelude size and header length, from the file's first bytes.
struct Prelude {
  std::size_t size = 0;
  std::size_t header_len = 0;
};

Prelude read_prelude(const unsigned char* b, std::size_t n, std::uint64_t file_size, const std::string& file) {
  if (n < 8)
    throw InputError(file, "header", "truncated header: the file has " + std::to_string(file_size) +
                     " bytes, a .npy file has at least 10", kRewriteFix);
  if (!std::equal(kMagic.begin(), kMagic.end(), b))
    throw InputError(file, "header", "not a .npy file (it does not start with the magic string \\x93NUMPY)", kRewriteFix);
  const int major = b[6], minor = b[7];
  if ((major != 1 && major != 2 && major != 3) || minor != 0)
    throw InputError(file, "header", "unsupported .npy format version " + std::to_string(major) + "." + std::to_string(minor) +
                     " (headroom reads 1.0, 2.0 and 3.0)", kRewriteFix);
  Prelude p;
  p.size = major == 1 ? 10 : 12;
  if (n < p.size) throw InputError(file, "header", "truncated header: the file ends inside the header length field", kRewriteFix);
  p.header_len = major == 1 ? std::size_t{b[8]} | std::size_t{b[9]} << 8
                            : std::size_t{b[8]} | std::size_t{b[9]} << 8 | std::size_t{b[10]} << 16 | std::size_t{b[11]} << 24;
  if (p.header_len > kMaxHeaderBytes)
    throw InputError(file, "header", "header length " + std::to_string(p.header_len) + " bytes is absurd (limit " +
                     std::to_string(kMaxHeaderBytes) + ")", kRewriteFix);
  if (p.size + p.header_len > file_size)
    throw InputError(file, "header", "truncated header: it claims " + std::to_string(p.header_len) + " bytes but the file has only " +
                     std::to_string(file_size - p.size) + " after the prelude", kRewriteFix);
  return p;
}

// The most data one array may hold: the machine's physical memory (sysconf,
// POSIX _SC_PHYS_PAGES), or 2^40 bytes where that is unknown.
std::uint64_t memory_cap() {
  static const std::uint64_t cap = [] {
    const long pages = ::sysconf(_SC_PHYS_PAGES), page = ::sysconf(_SC_PAGESIZE);
    return pages > 0 && page > 0 ? static_cast<std::uint64_t>(pages) * static_cast<std::uint64_t>(page)
                                 : std::uint64_t{1} << 40;
  }();
  return cap;
}

struct Layout {
  npy_detail::NpyHeader header;
  std::size_t data_offset = 0;
  std::size_t data_size = 0;
};

std::string shape_text(const std::vector<std::int64_t>& s) {
  std::string out = "(";
  for (std::size_t i = 0; i < s.size(); ++i) out += (i ? ", " : "") + std::to_string(s[i]);
  return out + (s.size() == 1 ? ",)" : ")");
}

// Checks the header fields and that the data the shape needs is exactly what
// the file holds — before anything is allocated for it.
Layout check_layout(const Prelude& p, std::string_view header_text, std::uint64_t file_size, const std::string& file) {
  Layout l;
  l.header = npy_detail::parse_header(header_text, p.size, file);
  l.data_offset = p.size + p.header_len;
  const auto& h = l.header;
  if (h.fortran_order)
    throw InputError(file, "header", "fortran_order is True (column-major data); headroom reads C order only",
                     "save a C-ordered copy: numpy.save(path, numpy.ascontiguousarray(a))");
  const auto item = npy_item_size(h.descr);
  if (!item) {
    std::string accepted;
    for (const auto& d : kDescrs) accepted += (accepted.empty() ? "" : " ") + std::string(d.descr);
    if (!h.descr.empty() && h.descr[0] == '>')
      throw InputError(file, "header", "dtype '" + h.descr + "' is big-endian; headroom reads little-endian data only",
                       "convert before saving: a.astype(a.dtype.newbyteorder('<'))");
    throw InputError(file, "header", "unsupported dtype '" + h.descr + "' (accepted: " + accepted + ")",
                     "convert the array to one of the accepted dtypes before saving");
  }
  // Overflow-safe size: every partial product stays below file_size + 1,
  // which is far below 2^63.
  std::uint64_t bytes = *item;
  bool too_big = false;
  for (std::int64_t e : h.shape) {
    const auto ue = static_cast<std::uint64_t>(e);
    if (ue != 0 && bytes > file_size / ue) too_big = true;
    bytes = too_big ? 0 : bytes * ue;
    if (too_big) break;
  }
  const std::uint64_t available = file_size - l.data_offset;
  if (too_big || bytes > available)
    throw InputError(file, "data",
                     "truncated data: shape " + shape_text(h.shape) + " of '" + h.descr + "' needs " +
                         (too_big ? std::string("more bytes than the file has") : std::to_string(bytes) + " bytes") +
                         ", the file holds " + std::to_string(available) + " after the header",
                     "the file is cut short or its header is wrong; " + std::string(kRewriteFix));
  if (bytes < available)
    throw InputError(file, "data",
                     std::to_string(available - bytes) + " bytes after the data that shape " + shape_text(h.shape) +
                         " of '" + h.descr + "' describes",
                     "the header's shape does not match the file; " + std::string(kRewriteFix));
  // A file can be sparse: its length is no proof its data fits in memory.
  if (bytes > memory_cap())
    throw InputError(file, "data",
                     "shape " + shape_text(h.shape) + " of '" + h.descr + "' needs " + std::to_string(bytes) +
                         " bytes, more than this machine's memory (" + std::to_string(memory_cap()) + " bytes)",
                     "the header is wrong, or the array is too large for headroom; " + std::string(kRewriteFix));
  l.data_size = static_cast<std::size_t>(bytes);
  return l;
}

void check_bools(const NpyArray& a, std::size_t data_offset, const std::string& file) {
  if (a.descr != "|b1") return;
  for (std::size_t i = 0; i < a.bytes.size(); ++i)
    if (a.bytes[i] > 1)
      throw InputError(file, "byte " + std::to_string(data_offset + i),
                       "bool element " + std::to_string(i) + " is " + std::to_string(a.bytes[i]) + ", not 0 or 1",
                       "store masks as numpy bool arrays (a != 0) or as uint8 '|u1'");
}

NpyArray make_array(Layout&& l) {
  NpyArray a;
  a.shape = std::move(l.header.shape);
  a.descr = std::move(l.header.descr);
  return a;
}

}  // namespace

std::int64_t NpyArray::count() const {
  std::int64_t n = 1;
  for (auto e : shape) n *= e;
  return n;
}

std::optional<std::size_t> npy_item_size(std::string_view descr) {
  for (const auto& d : kDescrs)
    if (d.descr == descr) return d.size;
  return std::nullopt;
}

NpyArray parse_npy(const unsigned char* data, std::size_t size, const std::string& file) {
  const Prelude p = read_prelude(data, size, size, file);
  const std::string_view text(reinterpret_cast<const char*>(data) + p.size, p.header_len);
  Layout l = check_layout(p, text, size, file);
  const std::size_t offset = l.data_offset, n = l.data_size;
  NpyArray a = make_array(std::move(l));
  a.bytes.assign(data + offset, data + offset + n);
  check_bools(a, offset, file);
  return a;
}

namespace {

// Reads exactly `n` bytes at `offset`; returns how many it got (fewer at end of file).
std::size_t read_at(const InputFile& f, void* into, std::size_t n, std::uint64_t offset, const std::string& file) {
  std::size_t got = 0;
  while (got < n) {
    const ssize_t r = pread(f.fd(), static_cast<char*>(into) + got, n - got, static_cast<off_t>(offset + got));
    if (r < 0 && errno == EINTR) continue;
    if (r < 0) throw InputError(file, "file", std::string("cannot be read: ") + std::strerror(errno), "check the permissions");
    if (r == 0) break;
    got += static_cast<std::size_t>(r);
  }
  return got;
}

}  // namespace

NpyArray read_npy(const std::filesystem::path& path) { return read_npy(open_input_file(path, kNpyInput), path); }

NpyArray read_npy(const InputFile& f, const std::filesystem::path& path) {
  const std::string file = path.string();
  const std::uint64_t file_size = f.size();

  std::array<unsigned char, 12> first{};
  const std::size_t first_n = static_cast<std::size_t>(std::min<std::uint64_t>(file_size, first.size()));
  if (read_at(f, first.data(), first_n, 0, file) != first_n)
    throw InputError(file, "header", "read failed (the file changed while being read?)", "read it again");
  const Prelude p = read_prelude(first.data(), first_n, file_size, file);

  std::string text(p.header_len, '\0');
  if (read_at(f, text.data(), text.size(), p.size, file) != text.size())
    throw InputError(file, "header", "read failed (the file changed while being read?)", "read it again");
  Layout l = check_layout(p, text, file_size, file);

  const std::size_t offset = l.data_offset, n = l.data_size;
  NpyArray a = make_array(std::move(l));
  try {
    a.bytes.resize(n);  // n ≤ the file's size and ≤ physical memory: checked by check_layout
  } catch (const std::bad_alloc&) {
    throw InputError(file, "data", "cannot allocate " + std::to_string(n) + " bytes for the data",
                     "free memory, or split the array");
  }
  const std::size_t got = read_at(f, a.bytes.data(), n, offset, file);
  if (got != n)
    throw InputError(file, "data", "read failed after " + std::to_string(got) + " of " + std::to_string(n) + " bytes",
                     "the file changed while being read; read it again");
  check_bools(a, offset, file);
  return a;
}

std::vector<unsigned char> npy_file_bytes(const NpyArray& a, NpyVersion version) {
  const auto item = npy_item_size(a.descr);
  if (!item) throw std::invalid_argument("npy_file_bytes: unsupported descr '" + a.descr + "'");
  std::uint64_t n = 1;
  for (auto e : a.shape) {
    if (e < 0) throw std::invalid_argument("npy_file_bytes: negative extent");
    n *= static_cast<std::uint64_t>(e);
  }
  if (n * *item != a.bytes.size())
    throw std::invalid_argument("npy_file_bytes: " + std::to_string(a.bytes.size()) + " bytes for " + std::to_string(n) +
                                " elements of '" + a.descr + "'");
  std::string dict = npy_detail::format_header(a.descr, a.shape);
  auto padded = [&](std::size_t prelude) {
    const std::size_t unpadded = prelude + dict.size() + 1;  // + '\n'
    return (unpadded + kAlign - 1) / kAlign * kAlign - prelude;
  };
  if (version == NpyVersion::automatic) version = padded(10) <= 0xFFFF ? NpyVersion::v1_0 : NpyVersion::v2_0;
  const std::size_t prelude = version == NpyVersion::v1_0 ? 10 : 12;
  const std::size_t header_len = padded(prelude);
  if (version == NpyVersion::v1_0 && header_len > 0xFFFF)
    throw std::invalid_argument("npy_file_bytes: header too long for format version 1.0");
  dict.append(header_len - dict.size() - 1, ' ');
  dict += '\n';

  std::vector<unsigned char> out(kMagic.begin(), kMagic.end());
  out.push_back(version == NpyVersion::v1_0 ? 1 : 2);
  out.push_back(0);
  for (std::size_t i = 0; i < prelude - 8; ++i) out.push_back(static_cast<unsigned char>(header_len >> (8 * i)));
  out.insert(out.end(), dict.begin(), dict.end());
  out.insert(out.end(), a.bytes.begin(), a.bytes.end());
  return out;
}

void write_npy(const std::filesystem::path& path, const NpyArray& a, NpyVersion version) {
  const std::vector<unsigned char> content = npy_file_bytes(a, version);
  write_file_atomically(path, std::string_view(reinterpret_cast<const char*>(content.data()), content.size()));
}

}  // namespace headroom
