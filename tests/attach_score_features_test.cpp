// headroom tests — soft caps and sink logits through attachment (kernel_abi.h
// version 2): declared, refused when undeclared, packed for plug-ins (in
// process and isolated) and written for external programs.
#include <gtest/gtest.h>

#include <filesystem>
#include <fstream>
#include <string>

#include "attach_cases.h"
#include "headroom/attach.h"
#include "headroom/external_program.h"
#include "headroom/input_error.h"
#include "headroom/kernel.h"
#include "headroom/kernel_abi.h"

namespace headroom {
namespace {

using testing::core_case;

// Writes, per row (b, h, i), O[..., 0] = the problem's features bits, O[..., 1]
// = its soft cap and O[..., 2] = head h's sink logit (NaN when none).
std::int32_t echo_features(const hr_core_problem* p) {
  auto* o = static_cast<float*>(p->o.data);
  for (std::int64_t b = 0; b < p->batch; ++b)
    for (std::int64_t h = 0; h < p->q_heads; ++h)
      for (std::int64_t i = 0; i < p->q_len; ++i) {
        float* row = o + b * p->o.strides[0] + h * p->o.strides[1] + i * p->o.strides[2];
        for (std::int64_t d = 0; d < p->value_dim; ++d) row[d * p->o.strides[3]] = 0.0f;
        row[0] = static_cast<float>(p->features);
        row[p->o.strides[3]] = p->softcap;
        row[2 * p->o.strides[3]] = p->sinks != nullptr ? p->sinks[h] : NAN;
      }
  return HR_OK;
}

hr_kernel echo_kernel(std::uint32_t features) {
  hr_kernel k{};
  k.abi_version = HEADROOM_ABI_VERSION;
  k.name = "echo_features";
  k.description = "writes the score features it was given";
  k.level = HR_LEVEL_CORE;
  k.input_format = HR_FORMAT_FLOAT32;
  k.output_format = HR_FORMAT_FLOAT32;
  k.mask_kinds = HR_MASK_NONE;
  k.masked_row = HR_MASKED_ROW_ZEROS;
  k.layouts = HR_LAYOUT_BHTD;
  k.run_core = echo_features;
  k.features = features;
  return k;
}

Case featured_case() {
  Case c = core_case({1, 2, 1, 2, 3, 4, 3}, MaskKind::none, 4);
  c.core.softcap = 12.5f;
  c.core.sinks = {1.75f, -0x1.8p+4f};
  return c;
}

TEST(AttachScoreFeatures, PackedForTheKernelInProcessAndIsolated) {
  const hr_kernel k = echo_kernel(HR_FEATURE_SOFTCAP | HR_FEATURE_SINKS);
  for (bool isolate : {false, true}) {
    auto kernel = attach_in_process(&k);
    const Case c = featured_case();
    const KernelRun run = kernel->run(receive(c, kernel->declaration()), RunOptions{isolate, 5.0, std::uint64_t{1} << 30});
    ASSERT_EQ(run.status, RunStatus::ok) << run.detail;
    for (std::int64_t h = 0; h < 2; ++h)
      for (std::int64_t i = 0; i < 2; ++i) {
        EXPECT_EQ(run.out.at(0, h, i, 0), HR_FEATURE_SOFTCAP | HR_FEATURE_SINKS) << "isolate " << isolate;
        EXPECT_EQ(run.out.at(0, h, i, 1), 12.5);
        EXPECT_EQ(run.out.at(0, h, i, 2), c.core.sinks[static_cast<std::size_t>(h)]);
      }
  }
  // A plain case reaches the same kernel with a zero (neutral) tail.
  auto kernel = attach_in_process(&k);
  const Case plain = core_case({1, 2, 1, 2, 3, 4, 3}, MaskKind::none, 4);
  const KernelRun run = kernel->run(receive(plain, kernel->declaration()), RunOptions{false, 5.0, std::uint64_t{1} << 30});
  ASSERT_EQ(run.status, RunStatus::ok) << run.detail;
  EXPECT_EQ(run.out.at(0, 0, 0, 0), 0.0);
  EXPECT_EQ(run.out.at(0, 0, 0, 1), 0.0);
  EXPECT_TRUE(std::isnan(run.out.at(0, 0, 0, 2)));
}

TEST(AttachScoreFeatures, UndeclaredFeaturesAreSkippedWithTheirReason) {
  const hr_kernel plain_kernel = echo_kernel(0);
  const KernelDeclaration none = declaration_of(&plain_kernel, "test");
  Case capped = core_case({1, 2, 1, 2, 3, 4, 3}, MaskKind::none, 4);
  capped.core.softcap = 3.0f;
  ASSERT_TRUE(why_unfit(capped, none));
  EXPECT_EQ(*why_unfit(capped, none), "soft cap not declared");
  Case sunk = core_case({1, 2, 1, 2, 3, 4, 3}, MaskKind::none, 4);
  sunk.core.sinks = {0.0f, 1.0f};
  ASSERT_TRUE(why_unfit(sunk, none));
  EXPECT_EQ(*why_unfit(sunk, none), "sink logits not declared");
  EXPECT_THROW(receive(sunk, none), InputError);
  const hr_kernel only_cap = echo_kernel(HR_FEATURE_SOFTCAP);
  const KernelDeclaration cap = declaration_of(&only_cap, "test");
  EXPECT_FALSE(why_unfit(capped, cap));
  EXPECT_TRUE(why_unfit(sunk, cap));
  EXPECT_NE(declaration_summary(cap).find("softcap=yes"), std::string::npos) << declaration_summary(cap);
}

TEST(AttachScoreFeatures, ExternalProgramsDeclareThemByName) {
  const std::string common = R"("protocol": 2, "name": "k", "level": "core", "input_format": "float32",
      "output_format": "float32", "mask_kinds": ["none"], "masked_row": "zeros")";
  const KernelDeclaration d = declaration_from_json("{" + common + R"(, "features": ["softcap", "sinks"]})", "prog");
  EXPECT_EQ(d.features, HR_FEATURE_SOFTCAP | HR_FEATURE_SINKS);
  EXPECT_EQ(declaration_from_json(declaration_to_json(d), "rt").features, d.features);
  try {
    declaration_from_json("{" + common + R"(, "features": ["paged"]})", "prog");
    ADD_FAILURE() << "an unjudged feature was accepted";
  } catch (const InputError& e) {
    EXPECT_NE(std::string(e.what()).find("\"softcap\""), std::string::npos) << e.what();
  }
  // Paged K/V and split partials are judged for plug-ins only: refused by name with the reason.
  for (const char* name : {"paged_kv", "split_partials"}) {
    try {
      declaration_from_json("{" + common + R"(, "features": [")" + name + R"("]})", "prog");
      ADD_FAILURE() << name << " was accepted from an external program";
    } catch (const InputError& e) {
      EXPECT_NE(std::string(e.what()).find("plug-ins only"), std::string::npos) << e.what();
    }
  }
}

}  // namespace
}  // namespace headroom
