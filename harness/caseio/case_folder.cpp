// headroom — reading and writing case folders (see case_folder.h).
#include "headroom/case_folder.h"

#include <fcntl.h>     // AT_FDCWD, open
#include <sys/stat.h>  // mkdir
#include <unistd.h>

#include <atomic>
#include <cerrno>
#include <cmath>
#include <cstdio>  // renameat2, RENAME_EXCHANGE (glibc ≥ 2.28, _GNU_SOURCE)
#include <cstring>
#include <fstream>
#include <set>
#include <stdexcept>
#include <tuple>
#include <string>
#include <vector>

#include "headroom/atomic_file.h"
#include "headroom/input_error.h"
#include "headroom/input_file.h"
#include "headroom/npy.h"
#include "headroom/paged_kv.h"
#include "manifest.h"

namespace headroom {
namespace {

namespace fs = std::filesystem;

constexpr const char* kManifest = "manifest.json";
// A manifest is a few hundred bytes; key_lengths grow it by a few bytes per
// batch entry. The bound only guards against reading a wrong, huge file.
constexpr std::uintmax_t kMaxManifestBytes = std::uintmax_t{16} << 20;

std::atomic<unsigned> temp_counter{0};

struct Slot {
  const char* file;
  Tensor* tensor;
  bool optional;
};

// The input tensors of a case with their fixed file names (case_folder.h).
// A paged case stores K and V as its pages (k_pages.npy, v_pages.npy
// [P, page_size, Hkv, D]); in memory they are the logical view (paged_kv.h).
std::vector<Slot> slots_of(Case& c) {
  const bool paged = c.level == Level::core && c.core.has_paged_kv();
  if (c.level == Level::core)
    return {{"q.npy", &c.core_inputs.q, false},
            {paged ? "k_pages.npy" : "k.npy", &c.core_inputs.k, false},
            {paged ? "v_pages.npy" : "v.npy", &c.core_inputs.v, false},
            {"d_o.npy", &c.d_o, true}};
  BlockInputs& b = c.block_inputs;
  return {{"x_q.npy", &b.x_q, false}, {"x_kv.npy", &b.x_kv, false}, {"w_q.npy", &b.w_q, false},
          {"w_k.npy", &b.w_k, false}, {"w_v.npy", &b.w_v, false}, {"w_o.npy", &b.w_o, false},
          {"b_q.npy", &b.b_q, true},  {"b_k.npy", &b.b_k, true},  {"b_v.npy", &b.b_v, true},
          {"b_o.npy", &b.b_o, true}};
}

Mask& mask_of(Case& c) { return c.level == Level::core ? c.core.mask : c.block.mask; }

bool absent(const Tensor& t) { return t.shape.empty() && t.values.empty(); }

std::string index_text(const std::vector<std::int64_t>& shape, std::size_t flat) {
  std::vector<std::int64_t> idx(shape.size());
  for (std::size_t a = shape.size(); a-- > 0;) {
    idx[a] = static_cast<std::int64_t>(flat % static_cast<std::size_t>(shape[a]));
    flat /= static_cast<std::size_t>(shape[a]);
  }
  std::string s = "[";
  for (std::size_t a = 0; a < idx.size(); ++a) s += (a ? ", " : "") + std::to_string(idx[a]);
  return s + "]";
}

// One InputError for validate()'s findings: the first one, located in the
// file it concerns, with the names of the others so none goes unreported.
[[noreturn]] void throw_findings(const std::vector<ProblemError>& found, const fs::path& dir, bool paged = false) {
  const ProblemError& e = found.front();
  std::string problem = e.message();
  if (found.size() > 1) {
    problem += " (and " + std::to_string(found.size() - 1) + " more:";
    for (std::size_t i = 1; i < found.size() && i < 4; ++i) problem += " " + found[i].field;
    problem += found.size() > 4 ? " ...)" : ")";
  }
  const std::string& f = e.field;
  auto after = [&](std::size_t n) { return f.size() > n ? f.substr(n) : std::string("data"); };
  if (f.rfind("inputs.", 0) == 0) {
    const std::size_t dot = f.find('.', 7);
    std::string name = f.substr(7, dot == std::string::npos ? std::string::npos : dot - 7);
    if (paged && (name == "k" || name == "v")) name += "_pages";
    throw InputError((dir / (name + ".npy")).string(), dot == std::string::npos ? "data" : f.substr(dot + 1), problem,
                     "make the tensor match the manifest's \"shape\", or correct the manifest");
  }
  if (f.rfind("mask.allowed", 0) == 0)
    throw InputError((dir / "mask.npy").string(), after(13), problem, "shape the dense mask [B, 1 or Hq, Tq, Tk]");
  if (f.rfind("mask.bias", 0) == 0)
    throw InputError((dir / "bias.npy").string(), after(10), problem,
                     "shape the bias [B, 1 or Hq, Tq, Tk], values finite or -inf");
  throw InputError((dir / kManifest).string(), "field \"" + f + "\"", problem, "correct the manifest");
}

// The reference is defined for finite inputs only (reference.h).
void check_finite(const Tensor& t, const fs::path& file) {
  for (std::size_t i = 0; i < t.values.size(); ++i)
    if (!std::isfinite(t.values[i]))
      throw InputError(file.string(), "element " + std::to_string(i) + " " + index_text(t.shape, i),
                       "value is " + std::string(std::isnan(t.values[i]) ? "NaN" : "infinite") + "; inputs must be finite",
                       "replace it, or mask the position instead");
}

void check_case(Case& c, const fs::path& dir) {
  const auto found = c.level == Level::core ? validate(c.core, c.core_inputs) : validate(c.block, c.block_inputs);
  if (!found.empty()) throw_findings(found, dir, c.level == Level::core && c.core.has_paged_kv());
  if (c.level == Level::core && !absent(c.d_o)) {
    const CoreShape& s = c.core.shape;
    const std::vector<std::int64_t> want{s.batch, s.q_heads, s.q_len, s.value_dim};
    if (c.d_o.shape != want)
      throw InputError((dir / "d_o.npy").string(), "shape", "does not match [B, Hq, Tq, Dv] of the manifest's \"shape\"",
                       "save dO with the shape of the attention output, or correct the manifest");
  }
  for (const Slot& s : slots_of(c)) check_finite(*s.tensor, dir / s.file);
}

// A paged case read: its layout checked, its pages [P, page_size, Hkv, D]
// shaped as the manifest says, then replaced by the logical view.
void gather_case_pages(Case& c, const fs::path& dir) {
  const auto found = validate(c.core);
  if (!found.empty()) throw_findings(found, dir, true);
  const CoreShape& s = c.core.shape;
  const PagedKv& p = c.core.paged;
  for (auto [file, t, dim] : {std::tuple{"k_pages.npy", &c.core_inputs.k, s.key_dim},
                              std::tuple{"v_pages.npy", &c.core_inputs.v, s.value_dim}}) {
    const std::vector<std::int64_t> want{p.num_pages, p.page_size, s.kv_heads, dim};
    auto text = [](const std::vector<std::int64_t>& v) {
      std::string out = "[";
      for (std::size_t a = 0; a < v.size(); ++a) out += (a ? ", " : "") + std::to_string(v[a]);
      return out + "]";
    };
    if (t->shape != want)
      throw InputError((dir / file).string(), "shape",
                       "is " + text(t->shape) + ", not [P, page_size, Hkv, D] = " + text(want) + " of the manifest",
                       "save the pages with the manifest's num_pages, page_size and shape, or correct the manifest");
    *t = gather_pages(p, *t, s.batch);
  }
}

// The case folder, open: its files are opened relative to it, never through a link.
class OpenFolder {
 public:
  explicit OpenFolder(const fs::path& dir) : dir_(dir), fd_(::open(dir.c_str(), O_RDONLY | O_DIRECTORY | O_CLOEXEC)) {
    if (fd_ < 0)
      throw InputError(dir.string(), "folder", std::string("cannot be opened: ") + std::strerror(errno),
                       "give the path of a case folder (it holds manifest.json)");
  }
  OpenFolder(const OpenFolder&) = delete;
  OpenFolder& operator=(const OpenFolder&) = delete;
  ~OpenFolder() { ::close(fd_); }
  InputFile open(const std::string& name, const InputKind& kind) const { return open_input_file_in(fd_, dir_, name, kind); }
  bool has(const std::string& name) const {
    struct stat st {};
    return ::fstatat(fd_, name.c_str(), &st, AT_SYMLINK_NOFOLLOW) == 0;
  }
  const fs::path& path() const { return dir_; }

 private:
  fs::path dir_;
  int fd_;
};

std::string read_manifest_text(const OpenFolder& folder) {
  const InputKind manifest{"case manifest", kMaxManifestBytes, "a case folder holds manifest.json; is this a case folder?"};
  return read_all(folder.open(kManifest, manifest), folder.path() / kManifest);
}

Tensor read_tensor(const OpenFolder& folder, const std::string& name, const std::set<std::string>& dtypes,
                   const std::string& why) {
  const fs::path file = folder.path() / name;
  const NpyArray a = read_npy(folder.open(name, kNpyInput), file);
  if (dtypes.count(a.descr) == 0) {
    std::string list;
    for (const auto& d : dtypes) list += (list.empty() ? "'" : " or '") + d + "'";
    throw InputError(file.string(), "header", "dtype '" + a.descr + "' where " + why + " calls for " + list,
                     "save the tensor with dtype " + list + (why.rfind("source", 0) == 0 ? ", or correct source_format" : ""));
  }
  return npy_to_tensor(a, file);
}

NpyArray to_npy(const Tensor& t, std::string_view descr, const fs::path& file) {
  try {
    return tensor_to_npy(t, descr);
  } catch (const std::invalid_argument& e) {
    throw InputError(file.string(), "data", e.what(), "round the values to the case's source_format before writing");
  }
}

void fsync_folder(const fs::path& dir) {
  const int fd = ::open(dir.c_str(), O_RDONLY | O_DIRECTORY | O_CLOEXEC);
  if (fd >= 0) {
    ::fsync(fd);  // best effort: the data itself is already flushed file by file
    ::close(fd);
  }
}

[[noreturn]] void write_failure(const fs::path& dir, const std::string& what) {
  throw InputError(dir.string(), "write", what + ": " + std::strerror(errno), "check that the parent folder exists and is writable");
}

// Moves the complete temporary folder to `dir`. An existing case folder is
// swapped out in one step (renameat2 RENAME_EXCHANGE, Linux ≥ 3.15) and then
// deleted; where the file system cannot exchange, two renames leave `dir`
// missing for an instant but never half-written.
void put_in_place(const fs::path& temp, const fs::path& dir, const fs::path& parent, const std::string& leaf) {
  std::error_code ec;
  if (!fs::exists(dir, ec)) {
    if (::rename(temp.c_str(), dir.c_str()) != 0) write_failure(dir, "cannot rename " + temp.string() + " into place");
    return;
  }
  if (!fs::is_directory(dir, ec) || !(fs::is_empty(dir, ec) || fs::exists(dir / kManifest, ec))) {
    throw InputError(dir.string(), "folder", "exists and is not a case folder (no manifest.json): not replacing it",
                     "choose another folder, or remove this one yourself");
  }
  if (::renameat2(AT_FDCWD, temp.c_str(), AT_FDCWD, dir.c_str(), RENAME_EXCHANGE) == 0) {
    fs::remove_all(temp, ec);  // now the previous case
    return;
  }
  if (errno != EINVAL && errno != ENOSYS && errno != ENOTSUP) write_failure(dir, "cannot exchange the new case with the old");
  const fs::path old = parent / ("." + leaf + ".old-" + std::to_string(::getpid()) + "-" + std::to_string(temp_counter++));
  if (::rename(dir.c_str(), old.c_str()) != 0) write_failure(dir, "cannot move the previous case aside");
  if (::rename(temp.c_str(), dir.c_str()) != 0) {
    const int saved = errno;
    ::rename(old.c_str(), dir.c_str());  // put the previous case back
    errno = saved;
    write_failure(dir, "cannot rename the new case into place");
  }
  fs::remove_all(old, ec);
}

}  // namespace

bool valid_case_name(std::string_view name) { return case_detail::valid_case_name(name); }

Case read_case(const fs::path& dir) {
  std::error_code ec;
  if (!fs::is_directory(dir, ec))
    throw InputError(dir.string(), "folder", fs::exists(dir, ec) ? "not a folder" : "no such folder",
                     "give the path of a case folder (it holds manifest.json)");
  const OpenFolder folder(dir);
  Case c = case_detail::parse_manifest(read_manifest_text(folder), (dir / kManifest).string());
  Mask& mask = mask_of(c);

  std::set<std::string> expected;
  for (const Slot& s : slots_of(c)) expected.insert(s.file);
  if (mask.kind == MaskKind::dense) expected.insert("mask.npy");
  if (mask.kind == MaskKind::bias) expected.insert("bias.npy");
  // A tensor the manifest does not call for is a sign the two disagree (say,
  // mask.npy left over with kind "causal_top_left"): refuse rather than ignore it.
  for (const auto& entry : fs::directory_iterator(dir, ec)) {
    const std::string name = entry.path().filename().string();
    if (entry.path().extension() == ".npy" && expected.count(name) == 0)
      throw InputError(entry.path().string(), "file",
                       "not part of a " + std::string(c.level == Level::core ? "core" : "block") + " case with mask kind " +
                           std::string(mask_kind_name(mask.kind)),
                       name == "mask.npy"   ? "set mask.kind to \"dense\", or remove the file"
                       : name == "bias.npy" ? "set mask.kind to \"bias\", or remove the file"
                                            : "remove the file, or correct the manifest's level");
  }

  const std::set<std::string> source{std::string(npy_descr_of(c.source_format))};
  const std::string why = "source_format " + std::string(format_name(c.source_format));
  for (const Slot& s : slots_of(c)) {
    if (s.optional && !folder.has(s.file)) continue;
    *s.tensor = read_tensor(folder, s.file, source, why);
  }
  if (mask.kind == MaskKind::dense) mask.allowed = read_tensor(folder, "mask.npy", {"|b1", "|u1"}, "a dense mask");
  if (mask.kind == MaskKind::bias) mask.bias = read_tensor(folder, "bias.npy", {"<f4", "<f8"}, "a bias mask");
  if (c.level == Level::core && c.core.has_paged_kv()) gather_case_pages(c, dir);
  check_case(c, dir);
  return c;
}

void write_case(const Case& original, const fs::path& target) {
  Case c = original;  // slots_of needs non-const access; the copy is never modified
  const fs::path dir = target.has_filename() ? target : target.parent_path();  // "out/case/" names "out/case"
  if (!case_detail::valid_case_name(c.name))
    throw InputError((dir / kManifest).string(), "field \"name\"", "\"" + c.name + "\" is not a valid case name",
                     "use 1 to 200 characters from A-Z a-z 0-9 _ . + -");
  check_case(c, dir);
  if (c.level == Level::core && c.core.has_paged_kv()) {
    c.core_inputs.k = scatter_pages(c.core.paged, c.core_inputs.k);
    c.core_inputs.v = scatter_pages(c.core.paged, c.core_inputs.v);
  }

  std::vector<std::pair<std::string, NpyArray>> files;
  const std::string_view descr = npy_descr_of(c.source_format);
  for (const Slot& s : slots_of(c)) {
    if (s.optional && absent(*s.tensor)) continue;
    files.emplace_back(s.file, to_npy(*s.tensor, descr, dir / s.file));
  }
  const Mask& mask = mask_of(c);
  if (mask.kind == MaskKind::dense) {
    bool boolean = true;
    for (double v : mask.allowed.values) boolean = boolean && (v == 0.0 || v == 1.0);
    files.emplace_back("mask.npy", to_npy(mask.allowed, boolean ? "|b1" : "|u1", dir / "mask.npy"));
  }
  if (mask.kind == MaskKind::bias) {
    bool single = true;
    for (double v : mask.bias.values) single = single && static_cast<double>(static_cast<float>(v)) == v;
    files.emplace_back("bias.npy", to_npy(mask.bias, single ? "<f4" : "<f8", dir / "bias.npy"));
  }
  const std::string manifest = case_detail::format_manifest(c);

  const fs::path parent = dir.has_parent_path() ? dir.parent_path() : fs::path(".");
  const std::string leaf = dir.filename().string();
  const fs::path temp = parent / ("." + leaf + ".tmp-" + std::to_string(::getpid()) + "-" + std::to_string(temp_counter++));
  if (::mkdir(temp.c_str(), 0755) != 0) write_failure(dir, "cannot create " + temp.string());
  try {
    for (const auto& [name, array] : files) write_npy(temp / name, array);
    write_file_atomically(temp / kManifest, manifest);
    fsync_folder(temp);
    put_in_place(temp, dir, parent, leaf);
  } catch (...) {
    std::error_code ec;
    fs::remove_all(temp, ec);
    throw;
  }
  fsync_folder(parent);
}

}  // namespace headroom
