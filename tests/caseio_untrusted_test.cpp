// headroom tests — nothing in a case folder is trusted: it runs nothing, loads nothing, writes nowhere else, allocates nothing it does not hold.
#include <fcntl.h>
#include <sys/stat.h>
#include <sys/wait.h>
#include <unistd.h>

#include <atomic>
#include <cerrno>
#include <cstdlib>
#include <filesystem>
#include <fstream>
#include <iterator>
#include <new>
#include <set>
#include <string>
#include <vector>

#include <gtest/gtest.h>
#include <nlohmann/json.hpp>

#include "headroom/case_folder.h"
#include "headroom/input_error.h"
#include "headroom/npy.h"

// ---- the largest single allocation, to show a refusal came before any ----------
//
// Replacing the global operator new is allowed ([replacement.functions]); the
// vectors the .npy reader fills allocate through it. GCC cannot see that the
// replacement pairs malloc with free and warns; the pairing is right.
#if defined(__GNUC__) && !defined(__clang__)
#pragma GCC diagnostic ignored "-Wmismatched-new-delete"
#endif
namespace {
std::atomic<std::size_t> g_largest_request{0};
void note_request(std::size_t n) {
  std::size_t seen = g_largest_request.load();
  while (n > seen && !g_largest_request.compare_exchange_weak(seen, n)) {
  }
}
}  // namespace

void* operator new(std::size_t n) {
  note_request(n);
  if (void* p = std::malloc(n == 0 ? 1 : n)) return p;
  throw std::bad_alloc();
}
void* operator new[](std::size_t n) { return operator new(n); }
void operator delete(void* p) noexcept { std::free(p); }
void operator delete[](void* p) noexcept { std::free(p); }
void operator delete(void* p, std::size_t) noexcept { std::free(p); }
void operator delete[](void* p, std::size_t) noexcept { std::free(p); }

namespace headroom {
namespace {

namespace fs = std::filesystem;
using nlohmann::json;

class TempDir {
 public:
  TempDir() {
    std::string tmpl = (fs::temp_directory_path() / "headroom-untrusted-XXXXXX").string();
    path_ = ::mkdtemp(tmpl.data());
  }
  ~TempDir() {
    std::error_code ec;
    fs::remove_all(path_, ec);
  }
  const fs::path& path() const { return path_; }

 private:
  fs::path path_;
};

Tensor filled(std::vector<std::int64_t> shape, int salt) {
  Tensor t(std::move(shape));
  for (std::size_t i = 0; i < t.values.size(); ++i) t.values[i] = static_cast<double>(static_cast<int>((i + salt) % 7) - 3) / 2;
  return t;
}

Case small_case() {
  Case c;
  c.name = "small";
  c.level = Level::core;
  c.core.shape = {1, 2, 1, 2, 3, 2, 2};
  c.core.scale = 0.5f;
  c.core.mask.kind = MaskKind::causal_bottom_right;
  c.core_inputs.q = filled({1, 2, 2, 2}, 1);
  c.core_inputs.k = filled({1, 1, 3, 2}, 2);
  c.core_inputs.v = filled({1, 1, 3, 2}, 3);
  c.provenance = {"gaussian", 7, "headroom generate --family gaussian --seed 7"};
  return c;
}

json read_json(const fs::path& p) {
  std::ifstream in(p);
  return json::parse(in);
}

void write_text(const fs::path& p, const std::string& text) {
  std::ofstream out(p, std::ios::binary | std::ios::trunc);
  out << text;
}

std::set<std::string> listing(const fs::path& dir) {
  std::set<std::string> names;
  for (const auto& e : fs::recursive_directory_iterator(dir)) names.insert(fs::relative(e.path(), dir).string());
  return names;
}

// The files mapped into this process (/proc/self/maps, proc(5)): a loaded library would add one.
std::set<std::string> mapped_files() {
  std::set<std::string> files;
  std::ifstream maps("/proc/self/maps");
  for (std::string line; std::getline(maps, line);) {
    const auto slash = line.find('/');
    if (slash != std::string::npos) files.insert(line.substr(slash));
  }
  return files;
}

bool contains(const std::string& s, const std::string& part) { return s.find(part) != std::string::npos; }

// ---- nothing is run or loaded -------------------------------------------------

TEST(Untrusted, ReadingACaseRunsNothingAndLoadsNothing) {
  TempDir tmp;
  const fs::path marker = tmp.path() / "marker";
  Case c = small_case();
  // Fields a careless reader might hand to a shell.
  c.provenance.family = "$(touch " + marker.string() + ")";
  c.provenance.command = "touch " + marker.string() + "; headroom generate `touch " + marker.string() + "`";
  const fs::path dir = tmp.path() / "small";
  write_case(c, dir);
  const auto maps_before = mapped_files();
  const Case back = read_case(dir);
  EXPECT_EQ(mapped_files(), maps_before) << "reading a case mapped a new file (a library?)";
  EXPECT_FALSE(fs::exists(marker)) << "reading a case ran a command from it";
  EXPECT_EQ(back.provenance.family, c.provenance.family) << "kept as inert text";
  EXPECT_EQ(back.provenance.command, c.provenance.command);
  errno = 0;
  EXPECT_EQ(waitpid(-1, nullptr, WNOHANG), -1);
  EXPECT_EQ(errno, ECHILD) << "reading a case started a process";
}

TEST(Untrusted, AShapedLibraryInPlaceOfATensorIsRefusedNotLoaded) {
  TempDir tmp;
  const fs::path dir = tmp.path() / "small";
  write_case(small_case(), dir);
  // An ELF shared object where q.npy should be: refused as a .npy, never mapped.
  const fs::path lib = "/lib/x86_64-linux-gnu/libm.so.6";
  if (!fs::exists(lib)) GTEST_SKIP() << lib << " not present";
  fs::copy_file(lib, dir / "q.npy", fs::copy_options::overwrite_existing);
  const auto maps_before = mapped_files();
  try {
    read_case(dir);
    ADD_FAILURE() << "a shared library was read as a tensor";
  } catch (const InputError& e) {
    EXPECT_EQ(e.file(), (dir / "q.npy").string());
    EXPECT_TRUE(contains(e.problem(), "not a .npy file")) << e.what();
  }
  EXPECT_EQ(mapped_files(), maps_before);
}

// ---- names that look like paths ------------------------------------------------

TEST(Untrusted, CaseNamesThatLookLikePathsAreRefused) {
  TempDir tmp;
  const fs::path dir = tmp.path() / "small";
  write_case(small_case(), dir);
  const json good = read_json(dir / "manifest.json");
  const std::string names[] = {"../../x", "..", ".", "a/b", "/etc/passwd", "", "x y", "$(reboot)", "a\\b",
                               "name\n", std::string("nul\0byte", 8), std::string(201, 'a'), "caf\xc3\xa9"};
  for (const std::string& name : names) {
    json m = good;
    m["name"] = name;
    write_text(dir / "manifest.json", m.dump());
    try {
      read_case(dir);
      ADD_FAILURE() << "name \"" << name << "\" was accepted";
    } catch (const InputError& e) {
      EXPECT_EQ(e.place(), "field \"name\"") << e.what();
    }
    Case c = small_case();
    c.name = name;
    const auto before = listing(tmp.path());
    EXPECT_THROW(write_case(c, tmp.path() / "written"), InputError) << name;
    EXPECT_EQ(listing(tmp.path()), before) << "a refused write left something behind";
  }
}

TEST(Untrusted, WritingACaseTouchesOnlyItsFolder) {
  TempDir tmp;
  Case c = small_case();
  c.name = "a..b";  // dots inside a name are allowed; they never form a path component
  c.provenance.family = "../../../etc";
  c.provenance.command = "rm -rf /";
  const fs::path parent = tmp.path() / "out";
  fs::create_directory(parent);
  write_case(c, parent / "case");
  EXPECT_EQ(listing(tmp.path()), (std::set<std::string>{"out", "out/case", "out/case/manifest.json", "out/case/q.npy",
                                                        "out/case/k.npy", "out/case/v.npy"}));
}

// ---- special files --------------------------------------------------------------

TEST(Untrusted, SpecialFilesAreRefusedWithoutBlocking) {
  TempDir tmp;
  const fs::path dir = tmp.path() / "small";
  write_case(small_case(), dir);
  fs::remove(dir / "q.npy");
  fs::create_symlink("/dev/zero", dir / "q.npy");
  try {
    read_case(dir);
    ADD_FAILURE() << "q.npy -> /dev/zero was read";
  } catch (const InputError& e) {
    EXPECT_TRUE(contains(e.problem(), "symbolic link")) << e.what();
  }
  fs::remove(dir / "q.npy");
  fs::create_directory(dir / "q.npy");
  EXPECT_THROW(read_case(dir), InputError);
  fs::remove(dir / "q.npy");
  write_case(small_case(), dir);
  // A named pipe as the manifest: opening it for reading would block forever.
  fs::remove(dir / "manifest.json");
  ASSERT_EQ(::mkfifo((dir / "manifest.json").c_str(), 0600), 0);
  EXPECT_THROW(read_case(dir), InputError);
}

// ---- sizes checked before allocating ----------------------------------------------

std::string npy_header(const std::string& descr, const std::string& shape) {
  std::string dict = "{'descr': '" + descr + "', 'fortran_order': False, 'shape': " + shape + ", }";
  dict += std::string(63 - (10 + dict.size()) % 64, ' ') + "\n";
  std::string out = "\x93NUMPY\x01";
  out += '\0';
  out += static_cast<char>(dict.size() & 0xff);
  out += static_cast<char>(dict.size() >> 8);
  return out + dict;
}

TEST(Untrusted, AHeaderClaimingTwoToTheFortyElementsIsRefusedBeforeAllocating) {
  std::string bytes = npy_header("<f4", "(1099511627776,)");
  bytes += std::string(100 - bytes.size() % 100, '\0');  // a file of a few hundred bytes
  TempDir tmp;
  const fs::path file = tmp.path() / "q.npy";
  write_text(file, bytes);
  for (int reader = 0; reader < 2; ++reader) {
    g_largest_request = 0;
    try {
      if (reader == 0) {
        parse_npy(reinterpret_cast<const unsigned char*>(bytes.data()), bytes.size(), "q.npy");
      } else {
        read_npy(file);
      }
      ADD_FAILURE() << "accepted";
    } catch (const InputError& e) {
      EXPECT_EQ(e.place(), "data");
      EXPECT_TRUE(contains(e.problem(), "truncated data")) << e.what();
    }
    EXPECT_LT(g_largest_request.load(), std::size_t{1} << 20) << "the reader allocated for the claimed data";
  }
}

TEST(Untrusted, ASparseFileLargerThanMemoryIsRefusedBeforeAllocating) {
  // 2^38 float32 = 1 TiB of data, held by a sparse file that takes no disk space.
  const std::string head = npy_header("<f4", "(274877906944,)");
  TempDir tmp;
  const fs::path file = tmp.path() / "q.npy";
  write_text(file, head);
  std::error_code ec;
  fs::resize_file(file, head.size() + (std::uintmax_t{1} << 40), ec);
  if (ec) GTEST_SKIP() << "this file system cannot hold a 1 TiB sparse file: " << ec.message();
  g_largest_request = 0;
  try {
    read_npy(file);
    ADD_FAILURE() << "a 1 TiB array was accepted";
  } catch (const InputError& e) {
    EXPECT_EQ(e.place(), "data");
    EXPECT_TRUE(contains(e.problem(), "more than this machine's memory")) << e.what();
  }
  EXPECT_LT(g_largest_request.load(), std::size_t{1} << 20);
}

// ---- JSON edge cases found by fuzzing -------------------------------------------

TEST(Untrusted, NumbersBeyondDoubleAreInputErrors) {
  // tests/fuzz/corpus/fuzz_manifest/regression_number_overflow.json: nlohmann's
  // out_of_range "number overflow" used to escape read_case uncaught.
  TempDir tmp;
  const fs::path dir = tmp.path() / "small";
  write_case(small_case(), dir);
  std::string text = read_json(dir / "manifest.json").dump(1);
  const std::string scale = "\"scale\": 0.5";
  ASSERT_NE(text.find(scale), std::string::npos) << text;
  text.replace(text.find(scale), scale.size(), "\"scale\": 1e400");
  write_text(dir / "manifest.json", text);
  try {
    read_case(dir);
    ADD_FAILURE() << "1e400 was accepted";
  } catch (const InputError& e) {
    EXPECT_EQ(e.file(), (dir / "manifest.json").string());
    EXPECT_TRUE(contains(e.place(), "line ")) << e.what();
    EXPECT_TRUE(contains(e.problem(), "1e400")) << e.what();
  }
}

TEST(Untrusted, DeeplyNestedJsonIsAnInputError) {
  TempDir tmp;
  const fs::path dir = tmp.path() / "small";
  write_case(small_case(), dir);
  const std::size_t depth = 100000;
  std::string text = read_json(dir / "manifest.json").dump();
  const std::string key = "\"provenance\":";
  const auto at = text.find(key);
  ASSERT_NE(at, std::string::npos);
  text = text.substr(0, at) + key + std::string(depth, '[') + std::string(depth, ']') + "}";
  write_text(dir / "manifest.json", text);
  EXPECT_THROW(read_case(dir), InputError);
}

}  // namespace
}  // namespace headroom
