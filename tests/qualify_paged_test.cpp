// headroom tests (qualify stage: they judge cases end to end) — paged K/V and split-KV partials end to end (kernel_abi.h
// version 2, HR_FEATURE_PAGED_KV and HR_FEATURE_SPLIT_PARTIALS): the layout's
// validation, the case folder's pages, the reference of the logical sequence,
// packing through the block table, the page probe and the split judgement.
#include <gtest/gtest.h>

#include <cmath>
#include <filesystem>
#include <map>
#include <memory>
#include <set>
#include <string>
#include <unistd.h>

#include "headroom/attach.h"
#include "headroom/bundled_registry.h"
#include "headroom/case_folder.h"
#include "headroom/faults.h"
#include "headroom/generate.h"
#include "headroom/input_error.h"
#include "headroom/judge.h"
#include "headroom/judge_splits.h"
#include "headroom/kernel.h"
#include "headroom/kernel_abi.h"
#include "headroom/paged_kv.h"
#include "headroom/reference.h"
#include "headroom/split_keys.h"

namespace headroom {
namespace {

namespace fs = std::filesystem;

Case paged_case(std::uint64_t seed, int size = 60) {
  CaseRequest r;
  r.family = "paged_decode";
  r.seed = seed;
  r.size = size;
  return make_case(r);
}

// A paged case with several sequences, shuffled pages, a shared prefix and two spare pages.
Case rich_case() {
  for (std::uint64_t seed = 1; seed < 400; ++seed) {
    Case c = paged_case(seed);
    const PagedKv& p = c.core.paged;
    const std::vector<int> n = p.sharers();
    bool shared = false, spare = false;
    for (int k : n) shared = shared || k > 1, spare = spare || k == 0;
    if (c.core.shape.batch >= 3 && shared && spare && c.core.shape.kv_len > 20) return c;
  }
  ADD_FAILURE() << "no paged_decode seed below 400 gives sharing, spare pages and 3 sequences";
  return paged_case(1);
}

AttachedKernel& bundled(const std::string& name) {
  static std::map<std::string, std::unique_ptr<AttachedKernel>> cache;
  auto& k = cache[name];
  if (!k) k = attach_in_process(find_bundled(name)->kernel);
  return *k;
}

TEST(PagedKv, GeneratedCasesAreValidAndCoverTheLastPageEdges) {
  std::set<std::int64_t> ends;  // len mod page size seen, with page size 16
  bool one_key = false, one_page = false, decode = false, speculative = false;
  for (std::uint64_t seed = 1; seed <= 400; ++seed) {
    const Case c = paged_case(seed);
    ASSERT_TRUE(c.core.has_paged_kv()) << c.name;
    EXPECT_TRUE(validate(c.core, c.core_inputs).empty()) << c.name << ": " << validate(c.core, c.core_inputs).front().message();
    const std::int64_t ps = c.core.paged.page_size;
    for (std::int64_t len : c.core.mask.kv_lens) {
      if (ps == 16) ends.insert(len % ps);
      one_key = one_key || len == 1;
      one_page = one_page || len == ps;
    }
    decode = decode || c.core.shape.q_len == 1;
    speculative = speculative || c.core.shape.q_len > 1;
  }
  EXPECT_EQ(ends.size(), 16u) << "sequences end on every row of a 16-key last page";
  EXPECT_TRUE(one_key && one_page && decode && speculative);
}

TEST(PagedKv, LayoutFindingsNameTheField) {
  Case c = rich_case();
  Case bad = c;
  bad.core.paged.block_table[0] = static_cast<std::int32_t>(bad.core.paged.num_pages);
  auto found = validate(bad.core);
  ASSERT_FALSE(found.empty());
  EXPECT_EQ(found.front().field, "paged.block_table[0][0]");
  bad = c;
  bad.core.mask.kv_lens[0] = bad.core.shape.kv_len + 1;
  ASSERT_FALSE(validate(bad.core).empty());
  EXPECT_EQ(validate(bad.core).front().field, "paged.seq_lens[0]");
  // Two sequences naming one page must agree on its content.
  bad = c;
  const std::vector<int> n = c.core.paged.sharers();
  for (std::int64_t b = 1; b < c.core.shape.batch; ++b)
    if (n[static_cast<std::size_t>(c.core.paged.page(b, 0))] > 1) bad.core_inputs.k.at(b, 0, 0, 0) += 1.0;
  found = validate(bad.core, bad.core_inputs);
  ASSERT_FALSE(found.empty());
  EXPECT_EQ(found.front().field, "inputs.k");
  // Sequence lengths without pages are refused.
  Case plain = c;
  plain.core.paged = PagedKv{};
  ASSERT_FALSE(validate(plain.core).empty());
  EXPECT_EQ(validate(plain.core).front().field, "mask.kv_lens");
}

TEST(PagedKv, CaseFolderStoresThePagesAndReadsTheSameCase) {
  const Case c = rich_case();
  const fs::path dir = fs::temp_directory_path() / ("headroom_paged_" + std::to_string(::getpid()));
  write_case(c, dir);
  EXPECT_TRUE(fs::exists(dir / "k_pages.npy"));
  EXPECT_TRUE(fs::exists(dir / "v_pages.npy"));
  EXPECT_FALSE(fs::exists(dir / "k.npy"));
  const Case back = read_case(dir);
  EXPECT_EQ(back.core.paged, c.core.paged);
  EXPECT_EQ(back.core.mask.kv_lens, c.core.mask.kv_lens);
  EXPECT_TRUE(bit_identical(back.core_inputs.k, c.core_inputs.k));
  EXPECT_TRUE(bit_identical(back.core_inputs.v, c.core_inputs.v));
  // Pages of the wrong extent: one line naming the file.
  fs::remove(dir / "v_pages.npy");
  fs::copy_file(dir / "k_pages.npy", dir / "v_pages.npy");
  if (c.core.shape.key_dim != c.core.shape.value_dim) {
    try {
      read_case(dir);
      ADD_FAILURE() << "mis-shaped pages accepted";
    } catch (const InputError& e) {
      EXPECT_NE(std::string(e.what()).find("v_pages.npy"), std::string::npos) << e.what();
    }
  }
  fs::remove_all(dir);
}

// The reference of a paged case is, row for row, the exact attention of each
// sequence alone over its own keys (a dense problem of Tk = its length).
TEST(PagedKv, ReferenceJudgesEachSequenceOverItsOwnKeys) {
  const Case c = rich_case();
  const CoreShape& s = c.core.shape;
  const CoreReference ref = reference_core(c.core, c.core_inputs, ReferenceOptions{});
  for (std::int64_t b = 0; b < s.batch; ++b) {
    const std::int64_t len = c.core.mask.kv_lens[static_cast<std::size_t>(b)];
    CoreProblem one;
    one.shape = {1, s.q_heads, s.kv_heads, s.q_len, len, s.key_dim, s.value_dim};
    one.scale = c.core.scale;
    one.mask.kind = c.core.mask.kind;
    CoreInputs in{Tensor({1, s.q_heads, s.q_len, s.key_dim}), Tensor({1, s.kv_heads, len, s.key_dim}),
                  Tensor({1, s.kv_heads, len, s.value_dim})};
    for (std::int64_t h = 0; h < s.q_heads; ++h)
      for (std::int64_t i = 0; i < s.q_len; ++i)
        for (std::int64_t d = 0; d < s.key_dim; ++d) in.q.at(0, h, i, d) = c.core_inputs.q.at(b, h, i, d);
    for (std::int64_t g = 0; g < s.kv_heads; ++g)
      for (std::int64_t j = 0; j < len; ++j) {
        for (std::int64_t d = 0; d < s.key_dim; ++d) in.k.at(0, g, j, d) = c.core_inputs.k.at(b, g, j, d);
        for (std::int64_t d = 0; d < s.value_dim; ++d) in.v.at(0, g, j, d) = c.core_inputs.v.at(b, g, j, d);
      }
    const CoreReference alone = reference_core(one, in, ReferenceOptions{});
    for (std::int64_t h = 0; h < s.q_heads; ++h)
      for (std::int64_t i = 0; i < s.q_len; ++i)
        for (std::int64_t d = 0; d < s.value_dim; ++d)
          ASSERT_EQ(ref.out.at(b, h, i, d), alone.out.at(0, h, i, d)) << "b=" << b << " h=" << h << " i=" << i;
  }
}

// Reads K/V through the block table and writes, per row, the sum of the
// first feature of every visible key's V (page 0 row 0 when `foreign`).
std::int32_t sum_values(const hr_core_problem* p, bool foreign) {
  if ((p->features & HR_FEATURE_PAGED_KV) == 0 || p->k.data != nullptr || p->v.data != nullptr) return HR_UNSUPPORTED;
  const hr_paged_kv& pk = p->paged;
  for (std::int64_t b = 0; b < p->batch; ++b)
    for (std::int64_t h = 0; h < p->q_heads; ++h)
      for (std::int64_t i = 0; i < p->q_len; ++i) {
        const std::int64_t g = h / (p->q_heads / p->kv_heads);
        double acc = 0;
        for (std::int64_t j = 0; j < pk.seq_lens[b]; ++j) {
          const std::int32_t page = foreign && j == 0 ? 0 : pk.block_table[b * pk.max_pages_per_seq + j / pk.page_size];
          const auto* v = static_cast<const float*>(pk.v_pages.data);
          acc += v[page * pk.v_pages.strides[0] + (j % pk.page_size) * pk.v_pages.strides[1] + g * pk.v_pages.strides[2]];
        }
        for (std::int64_t d = 0; d < p->value_dim; ++d)
          static_cast<float*>(p->o.data)[b * p->o.strides[0] + h * p->o.strides[1] + i * p->o.strides[2] +
                                          d * p->o.strides[3]] = static_cast<float>(acc);
      }
  return HR_OK;
}
std::int32_t sum_own(const hr_core_problem* p) { return sum_values(p, false); }
std::int32_t sum_foreign(const hr_core_problem* p) { return sum_values(p, true); }

hr_kernel summing_kernel(std::int32_t (*run)(const hr_core_problem*)) {
  hr_kernel k{};
  k.abi_version = HEADROOM_ABI_VERSION;
  k.name = "paged_sum";
  k.description = "sums V's first feature over the sequence's keys";
  k.level = HR_LEVEL_CORE;
  k.input_format = HR_FORMAT_FLOAT32;
  k.output_format = HR_FORMAT_FLOAT32;
  k.mask_kinds = HR_MASK_NONE | HR_MASK_CAUSAL_BOTTOM_RIGHT;
  k.masked_row = HR_MASKED_ROW_ZEROS;
  k.layouts = HR_LAYOUT_BHTD;
  k.run_core = run;
  k.features = HR_FEATURE_PAGED_KV;
  return k;
}

TEST(PagedKv, PackedThroughTheBlockTableInProcessAndIsolated) {
  const Case c = rich_case();
  const hr_kernel k = summing_kernel(sum_own);
  for (bool isolate : {false, true}) {
    auto kernel = attach_in_process(&k);
    const KernelRun run = kernel->run(receive(c, kernel->declaration()), RunOptions{isolate, 5.0, std::uint64_t{1} << 30});
    ASSERT_EQ(run.status, RunStatus::ok) << run.detail;
    for (std::int64_t b = 0; b < c.core.shape.batch; ++b) {
      double want = 0;
      for (std::int64_t j = 0; j < c.core.mask.kv_lens[static_cast<std::size_t>(b)]; ++j)
        want += c.core_inputs.v.at(b, 0, j, 0);
      EXPECT_NEAR(run.out.at(b, 0, 0, 0), want, 1e-4 * (1 + std::fabs(want))) << "b=" << b << " isolate " << isolate;
    }
  }
  // A kernel not declaring the feature is never given the case.
  hr_kernel plain = k;
  plain.features = 0;
  EXPECT_EQ(why_unfit(c, declaration_of(&plain, "test")).value_or(""), "paged K/V not declared");
}

TEST(PagedKv, ThePageProbeNamesAPageOutsideTheTable) {
  const Case c = rich_case();
  const hr_kernel own = summing_kernel(sum_own), foreign = summing_kernel(sum_foreign);
  for (const hr_kernel* k : {&own, &foreign}) {
    auto kernel = attach_in_process(k);
    ReceivedCase rc = receive(c, kernel->declaration());
    const KernelRun first = kernel->run(rc, RunOptions{false, 5.0, 0});
    ASSERT_EQ(first.status, RunStatus::ok);
    const auto f = detect_page_leak(*kernel, rc, first, RunOptions{false, 5.0, 0}, nullptr);
    EXPECT_TRUE(rc.poisoned_pages.empty() && rc.page_poison_k == 0 && rc.page_poison_v == 0);  // cleared again
    if (k == &own) {
      EXPECT_FALSE(f) << (f ? f->detail : "");
      continue;
    }
    ASSERT_TRUE(f);
    EXPECT_EQ(f->kind, FaultClass::mask_leak);
    EXPECT_NE(f->detail.find("page 0 ("), std::string::npos) << f->detail;
  }
}

TEST(PagedKv, TheLastPageReadWholeIsAMaskLeakNamingPageAndRow) {
  // A sequence ending inside its last page: the specimen attends the rest.
  for (std::uint64_t seed = 1; seed < 200; ++seed) {
    const Case c = paged_case(seed);
    const std::int64_t ps = c.core.paged.page_size;
    if (c.core.mask.kv_lens[0] % ps == 0) continue;
    const Judgement j = judge_case(bundled("paged_last_page_whole"), c, JudgeOptions{}, "");
    const Fault* leak = j.faults.find(FaultClass::mask_leak);
    ASSERT_NE(leak, nullptr) << c.name;
    EXPECT_NE(leak->detail.find("(page "), std::string::npos) << leak->detail;
    EXPECT_NE(leak->detail.find("past sequence"), std::string::npos) << leak->detail;
    const Judgement sound = judge_case(bundled("f32_paged_split"), c, JudgeOptions{}, "");
    EXPECT_TRUE(sound.faults.faults.empty()) << (sound.faults.faults.empty() ? "" : sound.faults.faults.front().detail);
    return;
  }
  ADD_FAILURE() << "no seed ends a sequence inside a page";
}

TEST(SplitKeys, EachSplitIsTheAttentionOverItsOwnKeys) {
  const Case c = rich_case();
  const std::int64_t tk = c.core.shape.kv_len, lo = tk / 3, hi = tk - 1;
  const SplitProblem sp = split_keys(c.core, c.core_inputs, lo, hi);
  ASSERT_TRUE(validate(sp.problem, sp.inputs).empty());
  for (std::int64_t b = 0; b < c.core.shape.batch; ++b)
    for (std::int64_t i = 0; i < c.core.shape.q_len; ++i)
      for (std::int64_t j = lo; j < hi; ++j)
        EXPECT_EQ(sp.problem.mask.visible(sp.problem.shape, b, 0, i, j - lo), c.core.mask.visible(c.core.shape, b, 0, i, j));
}

TEST(SplitPartials, RightPartialsAndMergePassAnUnnormalisedMergeIsItsOwnFault) {
  // Several splits of 32 keys: a sequence longer than 32.
  for (std::uint64_t seed = 1; seed < 300; ++seed) {
    const Case c = paged_case(seed, 100);
    if (c.core.mask.kv_lens[0] <= 40) continue;
    for (const char* name : {"f32_paged_split", "split_merge_unnormalised"}) {
      AttachedKernel& k = bundled(name);
      const ReceivedCase rc = receive(c, k.declaration());
      const KernelRun run = k.run(rc, RunOptions{false, 5.0, 0});
      ASSERT_EQ(run.status, RunStatus::ok);
      ASSERT_EQ(run.o_partials.shape[0], (c.core.shape.kv_len + 31) / 32);
      const SplitJudgement j = judge_splits(run, rc, 32, Format::float32, ReferenceOptions{});
      EXPECT_FALSE(j.partial) << name << ": " << (j.partial ? j.partial->detail : "");
      EXPECT_EQ(j.merge.has_value(), std::string(name) == "split_merge_unnormalised") << name;
      if (j.merge) {
        EXPECT_NE(j.merge->detail.find("every partial within budget"), std::string::npos);
      }
    }
    // A wrong partial is split_partial, not a merge fault.
    AttachedKernel& k = bundled("f32_paged_split");
    const ReceivedCase rc = receive(c, k.declaration());
    KernelRun run = k.run(rc, RunOptions{false, 5.0, 0});
    run.o_partials.values[0] += 0.25;
    const SplitJudgement j = judge_splits(run, rc, 32, Format::float32, ReferenceOptions{});
    ASSERT_TRUE(j.partial);
    EXPECT_EQ(j.partial->kind, FaultClass::split_partial);
    EXPECT_FALSE(j.merge);
    return;
  }
  ADD_FAILURE() << "no seed gives a sequence longer than 40 keys";
}

TEST(SplitPartials, DeclarationNeedsItsLength) {
  hr_kernel k = summing_kernel(sum_own);
  k.features = HR_FEATURE_SPLIT_PARTIALS;
  EXPECT_THROW(declaration_of(&k, "test"), InputError);  // split_kv_len 0
  k.split_kv_len = 16;
  EXPECT_EQ(declaration_of(&k, "test").split_kv_len, 16);
  k.features = 0;
  EXPECT_THROW(declaration_of(&k, "test"), InputError);  // a length without the feature
}

}  // namespace
}  // namespace headroom
