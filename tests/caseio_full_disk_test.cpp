// headroom tests — a full disk: every atomic writer of the caseio stage fails with a clear InputError and keeps the previous file.
#include <unistd.h>

#include <cstdio>
#include <filesystem>
#include <fstream>
#include <iterator>
#include <set>
#include <string>

#include <gtest/gtest.h>

#include "full_disk.h"
#include "headroom/atomic_file.h"
#include "headroom/case_folder.h"
#include "headroom/input_error.h"
#include "headroom/npy.h"

namespace headroom {
namespace {

namespace fs = std::filesystem;
using testing::ChildOutcome;
using testing::with_file_size_limit;

class TempDir {
 public:
  TempDir() {
    std::string tmpl = (fs::temp_directory_path() / "headroom-full-XXXXXX").string();
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

std::string read_text(const fs::path& p) {
  std::ifstream in(p, std::ios::binary);
  return {std::istreambuf_iterator<char>(in), std::istreambuf_iterator<char>()};
}

std::set<std::string> listing(const fs::path& dir) {
  std::set<std::string> names;
  for (const auto& e : fs::recursive_directory_iterator(dir)) names.insert(fs::relative(e.path(), dir).string());
  return names;
}

bool contains(const std::string& s, const std::string& part) { return s.find(part) != std::string::npos; }

// The failure is one InputError naming the file and the system's reason.
void expect_clear_error(const ChildOutcome& o, const fs::path& file) {
  EXPECT_EQ(o.kind, "InputError") << o.message;
  EXPECT_TRUE(contains(o.message, file.string())) << o.message;
  EXPECT_TRUE(contains(o.message, "File too large")) << o.message;  // strerror(EFBIG)
  EXPECT_TRUE(contains(o.message, "(fix: ")) << o.message;
}

constexpr std::uint64_t kLimit = 4096;

TEST(FullDisk, AtomicWriteFailsClearlyAndKeepsThePreviousFile) {
  TempDir tmp;
  const fs::path file = tmp.path() / "record.json";
  write_file_atomically(file, "the previous content\n");
  const auto before = listing(tmp.path());
  const ChildOutcome o = with_file_size_limit(kLimit, [&] { write_file_atomically(file, std::string(100000, 'x')); });
  expect_clear_error(o, file);
  EXPECT_EQ(read_text(file), "the previous content\n");
  EXPECT_EQ(listing(tmp.path()), before) << "a temporary file was left behind";
  // Within the limit the same write succeeds, so the limit is what failed it.
  EXPECT_EQ(with_file_size_limit(kLimit, [&] { write_file_atomically(file, "small\n"); }).kind, "returned");
  EXPECT_EQ(read_text(file), "small\n");
}

TEST(FullDisk, WriteNpyFailsClearlyAndKeepsThePreviousArray) {
  TempDir tmp;
  const fs::path file = tmp.path() / "q.npy";
  Tensor small({2, 2});
  small.values = {1, 2, 3, 4};
  write_npy(file, tensor_to_npy(small, "<f8"));
  const std::string previous = read_text(file);
  Tensor big({100, 100});
  const ChildOutcome o = with_file_size_limit(kLimit, [&] { write_npy(file, tensor_to_npy(big, "<f8")); });
  expect_clear_error(o, file);
  EXPECT_EQ(read_text(file), previous);
  EXPECT_EQ(listing(tmp.path()), std::set<std::string>{"q.npy"});
  EXPECT_TRUE(bit_identical(npy_to_tensor(read_npy(file), file), small));
}

Case core_case(std::int64_t kv_len) {
  Case c;
  c.name = "full_disk";
  c.core.shape = {1, 1, 1, 2, kv_len, 4, 4};
  c.core.scale = 0.5f;
  c.core_inputs.q = Tensor({1, 1, 2, 4});
  c.core_inputs.k = Tensor({1, 1, kv_len, 4});
  c.core_inputs.v = Tensor({1, 1, kv_len, 4});
  for (std::size_t i = 0; i < c.core_inputs.k.values.size(); ++i) c.core_inputs.k.values[i] = static_cast<double>(i % 5);
  return c;
}

TEST(FullDisk, WriteCaseFailsClearlyAndKeepsThePreviousCase) {
  TempDir tmp;
  const fs::path dir = tmp.path() / "case";
  write_case(core_case(3), dir);
  const auto before = listing(tmp.path());
  const std::string manifest = read_text(dir / "manifest.json");
  // k.npy of 2000 keys × 4 float32 is 32 KiB: past the limit.
  const ChildOutcome o = with_file_size_limit(kLimit, [&] { write_case(core_case(2000), dir); });
  expect_clear_error(o, "k.npy");
  std::printf("write_case on a full disk: %s\n", o.message.c_str());
  EXPECT_EQ(listing(tmp.path()), before) << "a temporary case folder was left behind";
  EXPECT_EQ(read_text(dir / "manifest.json"), manifest);
  EXPECT_EQ(read_case(dir).core.shape.kv_len, 3);
}

}  // namespace
}  // namespace headroom
