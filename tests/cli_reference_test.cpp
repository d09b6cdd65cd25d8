// headroom tests — `headroom reference` writes the certified reference of a case (tools/headroom/cmd_reference.cpp).
#include <gtest/gtest.h>
#include <sys/wait.h>
#include <unistd.h>

#include <cstdlib>
#include <filesystem>
#include <string>

#include "headroom/case_folder.h"
#include "headroom/npy.h"
#include "headroom/reference.h"
#include "reference_support.h"

namespace headroom {
namespace {

namespace fs = std::filesystem;
const std::string kTool = std::string(HEADROOM_BINARY_DIR) + "/tools/headroom";

int run(const std::string& args) {
  const int status = std::system((kTool + " " + args + " >/dev/null 2>&1").c_str());
  return WIFEXITED(status) ? WEXITSTATUS(status) : -1;
}

Tensor load(const fs::path& p) { return npy_to_tensor(read_npy(p), p); }

TEST(CliReference, WritesTheLibraryResultBitForBit) {
  const fs::path dir = fs::temp_directory_path() / ("headroom_cli_reference_" + std::to_string(::getpid()));
  fs::remove_all(dir);
  fs::create_directories(dir);
  CoreShape s;
  s.batch = 1;
  s.q_heads = 2;
  s.kv_heads = 1;
  s.q_len = 3;
  s.kv_len = 5;
  s.key_dim = 4;
  s.value_dim = 3;
  const auto cc = testing::random_core(s, 12);
  Case c;
  c.name = "cli_reference";
  c.level = Level::core;
  c.core = cc.problem;
  c.core.mask.kind = MaskKind::causal_top_left;
  c.core_inputs = cc.inputs;
  c.source_format = Format::float32;
  c.provenance = {"external", 12, "tests/cli_reference_test.cpp"};
  write_case(c, dir / "case");

  ASSERT_EQ(run("reference --case " + (dir / "case").string() + " --out " + (dir / "ref").string() + " --threads 2"), 0);
  const CoreReference want = reference_core(c.core, c.core_inputs);
  EXPECT_TRUE(bit_identical(load(dir / "ref" / "out.npy"), want.out));
  EXPECT_TRUE(bit_identical(load(dir / "ref" / "bound.npy"), want.bound));
  EXPECT_TRUE(bit_identical(load(dir / "ref" / "magnitude.npy"), want.magnitude));
  EXPECT_TRUE(bit_identical(load(dir / "ref" / "lse.npy"), want.lse));
  EXPECT_TRUE(bit_identical(load(dir / "ref" / "lse_bound.npy"), want.lse_bound));

  // The multiprecision method and the other backend enclose the same values.
  ASSERT_EQ(run("reference --case " + (dir / "case").string() + " --out " + (dir / "mp").string() +
                " --method multiprecision --backend cpp_bin_float"),
            0);
  EXPECT_TRUE(testing::enclose_same(load(dir / "mp" / "out.npy"), load(dir / "mp" / "bound.npy"), want.out, want.bound));

  EXPECT_EQ(run("reference --case " + (dir / "missing").string() + " --out " + (dir / "x").string()), 2);
  EXPECT_EQ(run("reference --case " + (dir / "case").string() + " --out " + (dir / "x").string() + " --method exact"), 2);
  EXPECT_EQ(run("reference --out " + (dir / "x").string()), 2);
  // Targets the reference cannot certify, or that claim nothing, are usage errors.
  for (const char* target : {"5000", "0", "-52", "-1001"})
    EXPECT_EQ(run("reference --case " + (dir / "case").string() + " --out " + (dir / "x").string() + " --target-log2 " +
                  target),
              2)
        << target;
  EXPECT_EQ(run("reference --case " + (dir / "case").string() + " --out " + (dir / "t").string() + " --target-log2 -1000"), 0);
  fs::remove_all(dir);
}

}  // namespace
}  // namespace headroom
