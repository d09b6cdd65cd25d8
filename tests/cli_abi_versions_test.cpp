// headroom tests — kernel_abi.h version 2 (docs/kernel-abi-v2.md): version-1
// plug-ins still load and run; the version-2 shape limits are read, checked
// and turned into skip reasons; fields this build does not judge are refused.
#include <sys/mman.h>
#include <sys/wait.h>
#include <unistd.h>

#include <cstddef>
#include <cstdio>
#include <cstring>
#include <string>

#include <gtest/gtest.h>

#include "headroom/attach.h"
#include "headroom/external_program.h"
#include "headroom/generate.h"
#include "headroom/input_error.h"
#include "headroom/kernel_abi.h"

namespace headroom {
namespace {

std::int32_t returns_ok(const hr_core_problem*) { return HR_OK; }

hr_kernel v2_kernel() {
  hr_kernel k{};
  k.abi_version = HEADROOM_ABI_VERSION;
  k.name = "v2_kernel";
  k.level = HR_LEVEL_CORE;
  k.input_format = HR_FORMAT_FLOAT32;
  k.output_format = HR_FORMAT_FLOAT32;
  k.mask_kinds = HR_MASK_NONE;
  k.masked_row = HR_MASKED_ROW_ZEROS;
  k.layouts = HR_LAYOUT_BHTD;
  k.run_core = returns_ok;
  return k;
}

// Returns the InputError text of declaration_of(k), or "" when it loads.
std::string refusal(const hr_kernel& k) {
  try {
    declaration_of(&k, "test.so");
  } catch (const InputError& e) {
    return e.what();
  }
  return "";
}

Case gaussian_case(const CoreShape& s) {
  CaseRequest r;
  r.family = "gaussian";
  r.seed = 7;
  r.shape = s;
  r.mask = MaskKind::key_padding;
  return make_case(r);
}

TEST(AbiVersions, AVersionOnePluginLoadsAndRunsBitForBitLikeItsVersionTwoBuild) {
  auto v1 = attach_library(HEADROOM_EXAMPLE_PLUGIN_ABI_V1);
  auto v2 = attach_library(HEADROOM_EXAMPLE_PLUGIN);
  EXPECT_EQ(v1->declaration().interface_version, 1);
  EXPECT_EQ(v2->declaration().interface_version, 2);
  EXPECT_EQ(declaration_summary(v1->declaration()), declaration_summary(v2->declaration()));
  const Case c = gaussian_case({2, 4, 2, 9, 33, 24, 16});
  const RunOptions opt{true, 20.0, std::uint64_t{1} << 30};
  const KernelRun r1 = v1->run(receive(c, v1->declaration()), opt);
  const KernelRun r2 = v2->run(receive(c, v2->declaration()), opt);
  ASSERT_EQ(r1.status, RunStatus::ok) << r1.detail;
  ASSERT_EQ(r2.status, RunStatus::ok) << r2.detail;
  ASSERT_EQ(r1.out.values.size(), r2.out.values.size());
  EXPECT_EQ(std::memcmp(r1.out.values.data(), r2.out.values.data(), r1.out.values.size() * sizeof(double)), 0);
}

TEST(AbiVersions, AVersionOneDeclarationIsNeverReadPastRunBlock) {
  // The version-1 hr_kernel ends where key_dims begins: place exactly that
  // many bytes just before an inaccessible page, so any read of a version-2
  // field faults the test.
  const std::size_t v1_size = offsetof(hr_kernel, key_dims);
  const long page = sysconf(_SC_PAGESIZE);
  auto* base = static_cast<unsigned char*>(
      mmap(nullptr, static_cast<std::size_t>(2 * page), PROT_READ | PROT_WRITE, MAP_PRIVATE | MAP_ANONYMOUS, -1, 0));
  ASSERT_NE(base, MAP_FAILED);
  ASSERT_EQ(mprotect(base + page, static_cast<std::size_t>(page), PROT_NONE), 0);
  hr_kernel full = v2_kernel();
  full.abi_version = 1;
  unsigned char* at = base + page - v1_size;
  at -= reinterpret_cast<std::uintptr_t>(at) % alignof(hr_kernel);  // keep the struct aligned; still ends within 8 bytes of the page
  std::memcpy(at, &full, v1_size);
  const KernelDeclaration d = declaration_of(reinterpret_cast<const hr_kernel*>(at), "v1.so");
  EXPECT_EQ(d.interface_version, 1);
  EXPECT_TRUE(d.key_dims.empty());
  EXPECT_EQ(d.head_dim_multiple, 1);
  munmap(base, static_cast<std::size_t>(2 * page));
}

TEST(AbiVersions, VersionsOutsideTheSpokenRangeAreRefused) {
  for (std::uint32_t v : {0u, static_cast<std::uint32_t>(HEADROOM_ABI_VERSION + 1)}) {
    hr_kernel k = v2_kernel();
    k.abi_version = v;
    const std::string e = refusal(k);
    EXPECT_NE(e.find("versions 1 to 2"), std::string::npos) << e;
    EXPECT_NE(e.find("test.so"), std::string::npos) << e;
  }
}

TEST(AbiVersions, ShapeLimitsAreReadAndBecomeCountableSkipReasons) {
  static const std::int32_t key_dims[] = {128, 64, 0};
  hr_kernel k = v2_kernel();
  k.mask_kinds = HR_MASK_NONE | HR_MASK_KEY_PADDING;
  k.key_dims = key_dims;
  k.kv_len_multiple = 16;
  k.max_q_len = 8;
  k.max_batch = 2;
  const KernelDeclaration d = declaration_of(&k, "test.so");
  EXPECT_EQ(d.key_dims, (std::vector<std::int64_t>{64, 128}));
  EXPECT_NE(declaration_summary(d).find("key_dims=64,128 kv_len_multiple=16 max_q_len=8 max_batch=2"),
            std::string::npos)
      << declaration_summary(d);
  EXPECT_FALSE(d.shape_unfit({1, 2, 1, 8, 32, 64, 80}));
  EXPECT_EQ(d.shape_unfit({1, 2, 1, 8, 32, 80, 80}).value_or(""), "key dim 80 not declared (64,128)");
  EXPECT_EQ(d.shape_unfit({1, 2, 1, 8, 33, 64, 64}).value_or(""), "Tk 33 not a multiple of the declared 16");
  EXPECT_EQ(d.shape_unfit({1, 2, 1, 9, 32, 64, 64}).value_or(""), "Tq over the declared maximum 8");
  EXPECT_EQ(d.shape_unfit({3, 2, 1, 8, 32, 64, 64}).value_or(""), "batch over the declared maximum 2");
  // The same reason through why_unfit, which the runner uses to skip and count.
  EXPECT_EQ(why_unfit(gaussian_case({1, 1, 1, 4, 32, 80, 16}), d).value_or(""), "key dim 80 not declared (64,128)");
}

TEST(AbiVersions, MalformedHeadDimListsAreRefused) {
  std::int32_t unterminated[65];
  for (std::int32_t& v : unterminated) v = 64;
  static const std::int32_t empty[] = {0};
  static const std::int32_t twice[] = {64, 64, 0};
  static const std::int32_t negative[] = {-64, 0};
  struct Bad {
    const std::int32_t* list;
    const char* says;
  };
  for (const Bad& b : {Bad{unterminated, "no terminating 0"}, Bad{empty, "empty"}, Bad{twice, "twice"},
                       Bad{negative, "head dim -64"}}) {
    hr_kernel k = v2_kernel();
    k.value_dims = b.list;
    const std::string e = refusal(k);
    EXPECT_NE(e.find(b.says), std::string::npos) << e;
    EXPECT_NE(e.find("value_dims"), std::string::npos) << e;
  }
  hr_kernel k = v2_kernel();
  k.head_dim_multiple = -8;
  EXPECT_NE(refusal(k).find("head_dim_multiple"), std::string::npos);
}

TEST(AbiVersions, FieldsThisBuildDoesNotJudgeAreRefusedByName) {
  struct Set {
    const char* field;
    void (*apply)(hr_kernel&);
  };
  const Set sets[] = {
      {"features", [](hr_kernel& k) { k.features = 1u << 6; }},  // a bit no version defines
  };
  for (const Set& s : sets) {
    hr_kernel k = v2_kernel();
    s.apply(k);
    const std::string e = refusal(k);
    EXPECT_NE(e.find(s.field), std::string::npos) << s.field << ": " << e;
    EXPECT_NE(e.find("not judged"), std::string::npos) << s.field << ": " << e;
  }
  // Paged K/V and split partials are judged; a split length without its feature is refused by name.
  hr_kernel k = v2_kernel();
  k.split_kv_len = 512;
  const std::string e = refusal(k);
  EXPECT_NE(e.find("split_kv_len"), std::string::npos) << e;
  EXPECT_NE(e.find("HR_FEATURE_SPLIT_PARTIALS"), std::string::npos) << e;
}

TEST(AbiVersions, BackwardFieldsAreJudgedAndCheckedByName) {
  hr_kernel k = v2_kernel();
  k.backward_flags = HR_BACKWARD_RECOMPUTES;  // flags without an entry
  std::string e = refusal(k);
  EXPECT_NE(e.find("backward_flags"), std::string::npos) << e;
  EXPECT_NE(e.find("no run_backward"), std::string::npos) << e;
  k.run_backward = [](const hr_backward_problem*) { return HR_OK; };
  k.backward_flags = 1u << 9;  // a bit outside HR_BACKWARD_*
  e = refusal(k);
  EXPECT_NE(e.find("bits outside HR_BACKWARD_"), std::string::npos) << e;
  k.backward_flags = 0;
  k.input_format = HR_FORMAT_E4M3;  // the backward reference takes float inputs only
  e = refusal(k);
  EXPECT_NE(e.find("e4m3 inputs is not judged"), std::string::npos) << e;
}

TEST(AbiVersions, ExternalProgramsDeclareTheSameFieldsUnderProtocolTwo) {
  const std::string common = R"("name": "k", "level": "core", "input_format": "float32", "output_format": "float32",
      "mask_kinds": ["none"], "masked_row": "zeros")";
  const KernelDeclaration d = declaration_from_json(
      R"({"protocol": 2, )" + common + R"(, "key_dims": [256, 64], "head_dim_multiple": 8, "max_batch": 4})", "prog");
  EXPECT_EQ(d.key_dims, (std::vector<std::int64_t>{64, 256}));
  EXPECT_EQ(d.head_dim_multiple, 8);
  EXPECT_EQ(d.max_batch, 4);
  EXPECT_EQ(d.interface_version, 2);
  const KernelDeclaration back = declaration_from_json(declaration_to_json(d), "rt");
  EXPECT_EQ(back.key_dims, d.key_dims);
  EXPECT_EQ(back.max_batch, d.max_batch);
  // Protocol 1 programs load unchanged, and cannot use a protocol 2 field.
  EXPECT_EQ(declaration_from_json(R"({"protocol": 1, )" + common + "}", "prog").interface_version, 1);
  try {
    declaration_from_json(R"({"protocol": 1, )" + common + R"(, "key_dims": [64]})", "prog");
    ADD_FAILURE() << "a protocol 2 field under protocol 1 was accepted";
  } catch (const InputError& e) {
    EXPECT_NE(std::string(e.what()).find("declare \"protocol\": 2"), std::string::npos) << e.what();
  }
}

TEST(AbiVersions, AVersionOnePluginPassesTheQuickSuiteFromTheCommandLine) {
  const std::string cmd =
      std::string(HEADROOM_CLI) + " qualify --kernel " + HEADROOM_EXAMPLE_PLUGIN_ABI_V1 + " --suite quick --quiet";
  const int st = std::system((cmd + " >/dev/null 2>&1").c_str());
  ASSERT_TRUE(WIFEXITED(st));
  EXPECT_EQ(WEXITSTATUS(st), 0) << cmd;
}

}  // namespace
}  // namespace headroom
