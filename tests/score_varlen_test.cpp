// headroom tests — packed variable-length batches judged end to end (varlen.h):
// the reference treats each sequence as its own problem, the sound f32_varlen
// kernel meets it, and a kernel whose key offsets run one past a sequence's
// end is caught as mask_leak naming the sequence and the neighbour's key.
#include <gtest/gtest.h>

#include <unistd.h>

#include <cstring>
#include <filesystem>
#include <fstream>
#include <iterator>
#include <nlohmann/json.hpp>

#include "attach_cases.h"
#include "headroom/attach.h"
#include "headroom/case_folder.h"
#include "headroom/external_program.h"
#include "headroom/npy.h"
#include "headroom/faults.h"
#include "headroom/input_error.h"
#include "headroom/reference.h"
#include "headroom/scores.h"
#include "headroom/varlen.h"
#include "kernel_list.h"

namespace headroom {
namespace {

namespace fs = std::filesystem;

const std::vector<std::int64_t> kQLens{3, 1, 0, 4, 2}, kKvLens{5, 1, 3, 0, 6};

// Sequences of lengths (3, 5), (1, 1), (0, 3), (4, 0: rows fully masked), (2, 6).
Case packed_case(MaskKind kind, std::uint32_t seed) {
  const std::int64_t tq = offsets_of(kQLens).back(), tk = offsets_of(kKvLens).back();
  Case c = testing::core_case({1, 2, 1, tq, tk, 8, 6}, MaskKind::none, seed);
  c.name = "varlen_case";
  c.core.mask.kind = kind;
  c.core.mask.cu_q_lens = offsets_of(kQLens);
  c.core.mask.cu_kv_lens = offsets_of(kKvLens);
  return c;
}

// Sequence n of `c` alone, as a dense problem of batch 1.
Case alone(const Case& c, std::int64_t n) {
  const SequenceSpan q = sequence(c.core.mask, n);
  Case d = c;
  d.core.mask.cu_q_lens.clear();
  d.core.mask.cu_kv_lens.clear();
  d.core.shape.q_len = q.q_len;
  d.core.shape.kv_len = q.kv_len;
  auto slice = [](const Tensor& t, std::int64_t begin, std::int64_t len) {
    Tensor out({1, t.shape[1], len, t.shape[3]});
    for (std::int64_t h = 0; h < t.shape[1]; ++h)
      for (std::int64_t i = 0; i < len; ++i)
        for (std::int64_t x = 0; x < t.shape[3]; ++x) out.at(0, h, i, x) = t.at(0, h, begin + i, x);
    return out;
  };
  d.core_inputs.q = slice(c.core_inputs.q, q.q_begin, q.q_len);
  d.core_inputs.k = slice(c.core_inputs.k, q.kv_begin, q.kv_len);
  d.core_inputs.v = slice(c.core_inputs.v, q.kv_begin, q.kv_len);
  return d;
}

TEST(ScoreVarlen, ReferenceRowsAreEachSequencesOwnAttention) {
  for (MaskKind kind : {MaskKind::none, MaskKind::causal_bottom_right, MaskKind::causal_top_left}) {
    const Case c = packed_case(kind, 3);
    const CoreReference ref = reference_core(c.core, c.core_inputs);
    for (std::int64_t n = 0; n < 5; ++n) {
      const SequenceSpan q = sequence(c.core.mask, n);
      if (q.q_len == 0 || q.kv_len == 0) continue;  // no rows; or rows fully masked, checked below
      const Case d = alone(c, n);
      const CoreReference r = reference_core(d.core, d.core_inputs);
      for (std::int64_t h = 0; h < 2; ++h)
        for (std::int64_t i = 0; i < q.q_len; ++i)
          for (std::int64_t x = 0; x < 6; ++x) {
            const double want = r.out.at(0, h, i, x), got = ref.out.at(0, h, q.q_begin + i, x);
            if (std::isnan(want)) {
              EXPECT_TRUE(std::isnan(got));
            } else {
              EXPECT_EQ(got, want) << mask_kind_name(kind) << " sequence " << n << " row " << i;
            }
          }
    }
    // Sequence 3 has no keys: its rows (packed 4..7) are fully masked.
    for (std::int64_t i = 4; i < 8; ++i) EXPECT_EQ(ref.fully_masked[static_cast<std::size_t>(i)], 1) << i;
    EXPECT_EQ(ref.fully_masked[0], 0);
  }
}

TEST(ScoreVarlen, SoundKernelMeetsTheReferenceAndShowsNoFault) {
  auto kernel = attach_in_process(&hr_kernels::f32_varlen);
  for (MaskKind kind : {MaskKind::none, MaskKind::causal_bottom_right}) {
    ReceivedCase rc = receive(packed_case(kind, 5), kernel->declaration());
    const KernelRun run = kernel->run(rc, RunOptions{true, 10.0, std::uint64_t{1} << 30});
    ASSERT_EQ(run.status, RunStatus::ok) << run.detail;
    const CoreReference ref = reference_core(rc.received.core, rc.received.core_inputs);
    const CaseScore s = score_core(run.out, &run.lse, ref, Format::float32);
    EXPECT_LT(s.max_scaled_error, 8.0) << mask_kind_name(kind);
    ASSERT_TRUE(s.lse_error.has_value());
    EXPECT_LT(*s.lse_error, 1e-5);
    const CaseFaults f = detect_faults(*kernel, rc, run, ref);
    EXPECT_TRUE(f.faults.empty()) << (f.faults.empty() ? "" : f.faults.front().detail);
  }
}

TEST(ScoreVarlen, OffsetOffByOneIsAMaskLeakNamingTheSequences) {
  auto kernel = attach_in_process(&hr_kernels::varlen_offset_off_by_one);
  ReceivedCase rc = receive(packed_case(MaskKind::none, 7), kernel->declaration());
  const KernelRun run = kernel->run(rc, RunOptions{true, 10.0, std::uint64_t{1} << 30});
  ASSERT_EQ(run.status, RunStatus::ok) << run.detail;
  const CoreReference ref = reference_core(rc.received.core, rc.received.core_inputs);
  const CaseFaults f = detect_faults(*kernel, rc, run, ref);
  const Fault* leak = f.find(FaultClass::mask_leak);
  ASSERT_NE(leak, nullptr);
  // The leaking key is the first key of the sequence after the row's own
  // (after sequence 3, which has no keys, that is key 0 of sequence 4).
  ASSERT_EQ(leak->where.size(), 4u) << leak->detail;
  const Mask& m = rc.received.core.mask;
  const SequenceSpan own = sequence_of_row(m, leak->where[2]);
  EXPECT_EQ(leak->where[3], own.kv_begin + own.kv_len) << leak->detail;
  EXPECT_NE(leak->detail.find(row_place(m, leak->where[2])), std::string::npos) << leak->detail;
  EXPECT_NE(leak->detail.find(key_place(m, leak->where[3])), std::string::npos) << leak->detail;
  EXPECT_NE(leak->detail.find("must see only its own sequence's keys"), std::string::npos) << leak->detail;
  // The sound kernel on the same case: no leak.
  auto sound = attach_in_process(&hr_kernels::f32_varlen);
  ReceivedCase rs = receive(packed_case(MaskKind::none, 7), sound->declaration());
  const KernelRun good = sound->run(rs, RunOptions{true, 10.0, std::uint64_t{1} << 30});
  EXPECT_EQ(detect_faults(*sound, rs, good, ref).find(FaultClass::mask_leak), nullptr);
}

TEST(ScoreVarlen, UndeclaredVarlenIsSkippedWithItsReason) {
  const auto plain = attach_in_process(&hr_kernels::f32_textbook);
  const auto reason = why_unfit(packed_case(MaskKind::none, 1), plain->declaration());
  ASSERT_TRUE(reason.has_value());
  EXPECT_EQ(*reason, "variable lengths not declared");
}

TEST(ScoreVarlen, CaseFolderRoundTripsTheLengths) {
  const fs::path dir = fs::temp_directory_path() / ("headroom_varlen_case_" + std::to_string(::getpid()));
  const Case c = packed_case(MaskKind::causal_bottom_right, 9);
  write_case(c, dir);
  const Case back = read_case(dir);
  EXPECT_EQ(back.core.mask.cu_q_lens, c.core.mask.cu_q_lens);
  EXPECT_EQ(back.core.mask.cu_kv_lens, c.core.mask.cu_kv_lens);
  EXPECT_EQ(back.core_inputs.k.values, c.core_inputs.k.values);
  // Lengths that do not sum to the shape's are refused naming the field.
  Case bad = c;
  bad.core.mask.cu_kv_lens.back() -= 1;
  EXPECT_THROW(write_case(bad, dir), InputError);
  // And in a manifest: one line naming the file and the field.
  std::ifstream in(dir / "manifest.json");
  std::string text((std::istreambuf_iterator<char>(in)), std::istreambuf_iterator<char>());
  in.close();
  const std::size_t at = text.find("\"q_lens\": [\n      3");
  ASSERT_NE(at, std::string::npos) << text;
  text.replace(text.find('3', at), 1, "4");
  std::ofstream(dir / "manifest.json") << text;
  try {
    read_case(dir);
    ADD_FAILURE() << "a manifest whose lengths disagree with its shape was read";
  } catch (const InputError& e) {
    EXPECT_NE(std::string(e.what()).find("manifest.json"), std::string::npos) << e.what();
    EXPECT_NE(std::string(e.what()).find("\"varlen\""), std::string::npos) << e.what();
  }
  fs::remove_all(dir);
}

TEST(ScoreVarlen, ExternalProgramsGetTheOffsetsFiles) {
  const std::string decl = R"({"protocol": 2, "name": "k", "level": "core", "input_format": "float32",
      "output_format": "float32", "mask_kinds": ["none", "causal_bottom_right"], "masked_row": "zeros",
      "returns_lse": true, "features": ["varlen"]})";
  const KernelDeclaration d = declaration_from_json(decl, "prog");
  EXPECT_EQ(d.features, HR_FEATURE_VARLEN);
  const fs::path dir = fs::temp_directory_path() / ("headroom_varlen_exchange_" + std::to_string(::getpid()));
  fs::create_directories(dir);
  write_exchange(dir, receive(packed_case(MaskKind::causal_bottom_right, 2), d), d);
  std::ifstream f(dir / "problem.json");
  const nlohmann::json p = nlohmann::json::parse(f);
  EXPECT_EQ(p["shape"]["batch"], 1);
  EXPECT_EQ(p["shape"]["q_len"], 10);  // the packed total
  EXPECT_EQ(p["varlen"]["sequences"], 5);
  EXPECT_EQ(p["varlen"]["max_q_len"], 4);
  EXPECT_EQ(p["varlen"]["max_kv_len"], 6);
  EXPECT_EQ(p["outputs"]["lse"]["shape"], nlohmann::json::array({1, 2, 10}));
  const NpyArray cu = read_npy(dir / p["varlen"]["cu_kv_lens"].get<std::string>());
  ASSERT_EQ(cu.shape, (std::vector<std::int64_t>{6}));
  std::vector<std::int64_t> got(6);
  std::memcpy(got.data(), cu.bytes.data(), sizeof(std::int64_t) * 6);
  EXPECT_EQ(got, offsets_of(kKvLens));
  fs::remove_all(dir);
}

}  // namespace
}  // namespace headroom
