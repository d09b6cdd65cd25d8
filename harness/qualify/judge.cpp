// headroom — judging one case (judge.h).
#include "headroom/judge.h"

#include <algorithm>
#include <cmath>
#include <limits>
#include <utility>

#include "headroom/bundled_registry.h"
#include "headroom/judge_backward.h"
#include "headroom/judge_splits.h"
#include "headroom/problem.h"

namespace headroom {
namespace {

std::string join(const std::vector<std::int64_t>& v) {
  std::string s;
  for (std::size_t i = 0; i < v.size(); ++i) s += (i ? "," : "") + std::to_string(v[i]);
  return s;
}

bool all_finite(const Tensor& t) {
  return std::all_of(t.values.begin(), t.values.end(), [](double x) { return std::isfinite(x); });
}

// Returns: the name of the first received tensor holding a non-finite value, or empty.
// Rounding a source value beyond a format's range gives ±inf (binary16 past 65519.99):
// such a case says nothing about the kernel's arithmetic and has no exact answer.
std::string first_non_finite_input(const Case& r) {
  if (r.level == Level::core) {
    const auto& in = r.core_inputs;
    if (!all_finite(in.q)) return "Q";
    if (!all_finite(in.k)) return "K";
    if (!all_finite(in.v)) return "V";
    if (!all_finite(r.d_o)) return "dO";
    return {};
  }
  const auto& in = r.block_inputs;
  const std::pair<const char*, const Tensor*> named[] = {{"X_q", &in.x_q}, {"X_kv", &in.x_kv}, {"W_q", &in.w_q},
                                                         {"W_k", &in.w_k}, {"W_v", &in.w_v},   {"W_o", &in.w_o},
                                                         {"b_q", &in.b_q}, {"b_k", &in.b_k},   {"b_v", &in.b_v},
                                                         {"b_o", &in.b_o}};
  for (const auto& [name, t] : named)
    if (!all_finite(*t)) return name;
  return {};
}

// The reference of a case of either level, behind one face.
struct AnyReference {
  std::optional<CoreReference> core;
  std::optional<BlockReference> block;
};

AnyReference reference_of(const Case& c, const ReferenceOptions& opt) {
  AnyReference r;
  if (c.level == Level::core)
    r.core = reference_core(c.core, c.core_inputs, opt);
  else
    r.block = reference_block(c.block, c.block_inputs, opt);
  return r;
}

CaseScore score_of(const KernelRun& run, const AnyReference& ref, Format f) {
  if (ref.core) return score_core(run.out, run.lse.values.empty() ? nullptr : &run.lse, *ref.core, f);
  return score_block(run.out, *ref.block, f);
}

CaseFaults faults_of(AttachedKernel& k, ReceivedCase& rc, const KernelRun& run, const AnyReference& ref,
                     const DetectorOptions& opt) {
  if (ref.core) return detect_faults(k, rc, run, *ref.core, opt);
  return detect_faults(k, rc, run, *ref.block, opt);
}

void record_faults(CaseRecord& rec, const CaseFaults& f) {
  for (const auto& fault : f.faults) {
    rec.faults[std::string(fault_class_name(fault.kind))] += 1;
    rec.fault_details.push_back(std::string(fault_class_name(fault.kind)) + ": " + fault.detail);
  }
  if (f.bad_output_runs > 0) {
    rec.faults["bad_output"] += 1;
    rec.fault_details.push_back("bad_output: " + (f.bad_output_detail.empty() ? "missing or malformed output"
                                                                                : f.bad_output_detail));
  }
  // A declined case (unsupported) is no fault: run_cases lists it among the skipped, with the reason.
}

void fill_figures(CaseFigures& fig, const CaseScore& s) {
  fig.elements = s.elements;
  fig.max_ulp = static_cast<double>(s.max_ulp);
  fig.max_scaled_error = s.max_scaled_error;
  fig.max_abs_error = s.max_abs_error;
  fig.rmse = s.rmse;
  fig.relative_rmse = s.relative_rmse;
  fig.relative_l1 = s.relative_l1;
  fig.cosine = s.cosine;
  fig.lse_error = s.lse_error ? *s.lse_error : std::numeric_limits<double>::quiet_NaN();
  fig.kernel_error = s.max_scaled_error;
  fig.worst_index = join(s.worst_scaled.index);
  fig.worst_expected = s.worst_scaled.expected;
  fig.worst_obtained = s.worst_scaled.obtained;
  fig.worst_ulp_at = static_cast<double>(s.worst_scaled.error.ulp);
}

}  // namespace

std::vector<std::uint8_t> sample_rows(const CoreShape& s, std::int64_t key_rows) {
  const std::int64_t rows = s.batch * s.q_heads * s.q_len;
  if (rows * s.kv_len <= key_rows) return {};
  const std::int64_t want = std::min(rows, std::max<std::int64_t>(16, key_rows / std::max<std::int64_t>(1, s.kv_len)));
  if (want >= rows) return {};
  std::vector<std::uint8_t> pick(static_cast<std::size_t>(rows), 0);
  // Row (k+1)·rows/want − 1 for k = 0 … want−1: evenly spread, the last row included.
  for (std::int64_t k = 0; k < want; ++k) pick[static_cast<std::size_t>((k + 1) * rows / want - 1)] = 1;
  return pick;
}

int leak_patterns_for(const CoreShape& s, int most) {
  const std::int64_t work = s.batch * s.q_heads * s.q_len * s.kv_len * (s.key_dim + s.value_dim);
  const std::int64_t fit = kLeakProbeWork / std::max<std::int64_t>(1, 3 * work);
  return static_cast<int>(std::clamp<std::int64_t>(fit, 1, std::max(1, most)));
}

bool receives_alike(const KernelDeclaration& a, const KernelDeclaration& b) {
  return a.level == b.level && a.input_format == b.input_format && a.output_format == b.output_format &&
         a.q_quant == b.q_quant && a.k_quant == b.k_quant && a.v_quant == b.v_quant;
}

std::unique_ptr<AttachedKernel> plain_kernel_for(const KernelDeclaration& d) {
  const BundledKernel* best = nullptr;
  for (const auto& b : bundled_kernels()) {
    if (b.flawed || !receives_alike(b.declaration, d)) continue;
    const bool textbook = b.declaration.name.find("textbook") != std::string::npos;
    if (!best || (textbook && best->declaration.name.find("textbook") == std::string::npos)) best = &b;
  }
  return best ? attach_in_process(best->kernel) : nullptr;
}

std::string shape_text(const Case& c) {
  auto j = [](std::initializer_list<std::int64_t> v) { return join(std::vector<std::int64_t>(v)); };
  if (c.level == Level::core) {
    const auto& s = c.core.shape;
    return j({s.batch, s.q_heads, s.kv_heads, s.q_len, s.kv_len, s.key_dim, s.value_dim});
  }
  const auto& s = c.block.shape;
  return j({s.batch, s.q_len, s.kv_len, s.model_dim, s.q_heads, s.kv_heads, s.key_dim, s.value_dim});
}

double logit_scale(const Case& c) {
  if (c.level != Level::core) {
    // Block: project with plain double arithmetic, then as for core.
    const auto& s = c.block.shape;
    const auto& in = c.block_inputs;
    auto project = [&](const Tensor& x, const Tensor& w, const Tensor& b, std::int64_t t_len, std::int64_t heads,
                       std::int64_t dim) {
      Tensor out({s.batch, heads, t_len, dim});
      for (std::int64_t bt = 0; bt < s.batch; ++bt)
        for (std::int64_t t = 0; t < t_len; ++t)
          for (std::int64_t col = 0; col < heads * dim; ++col) {
            double acc = b.values.empty() ? 0.0 : b.values[static_cast<std::size_t>(col)];
            for (std::int64_t m = 0; m < s.model_dim; ++m)
              acc += x.at(0, bt, t, m) * w.values[static_cast<std::size_t>(m * heads * dim + col)];
            out.at(bt, col / dim, t, col % dim) = acc;
          }
      return out;
    };
    Tensor xq = in.x_q, xkv = in.x_kv;
    xq.shape.insert(xq.shape.begin(), 1);
    xkv.shape.insert(xkv.shape.begin(), 1);
    Case core;
    core.level = Level::core;
    core.core = {s.core(), c.block.scale, c.block.mask};
    core.core_inputs.q = project(xq, in.w_q, in.b_q, s.q_len, s.q_heads, s.key_dim);
    core.core_inputs.k = project(xkv, in.w_k, in.b_k, s.kv_len, s.kv_heads, s.key_dim);
    return logit_scale(core);
  }
  const auto& s = c.core.shape;
  const auto& in = c.core_inputs;
  double worst = 0;
  for (std::int64_t b = 0; b < s.batch; ++b)
    for (std::int64_t h = 0; h < s.q_heads; ++h)
      for (std::int64_t i = 0; i < s.q_len; ++i)
        for (std::int64_t j = 0; j < s.kv_len; ++j) {
          if (!c.core.mask.visible(s, b, h, i, j)) continue;
          double dot = 0;
          const std::int64_t g = kv_head_of(s, h);
          for (std::int64_t d = 0; d < s.key_dim; ++d) dot += in.q.at(b, h, i, d) * in.k.at(b, g, j, d);
          const double z = static_cast<double>(c.core.scale) * dot + c.core.mask.bias_at(b, h, i, j);
          if (std::isfinite(z)) worst = std::max(worst, std::fabs(z));
        }
  return worst;
}

namespace {

// The case a kernel of declaration `d` is handed before rounding: `c` with
// its upstream gradient (with_upstream_gradient), Q, K, V and the block
// inputs moved out of `c` rather than copied (left empty there).
Case taken_for_receive(Case& c, const KernelDeclaration& d) {
  CoreInputs core = std::exchange(c.core_inputs, CoreInputs{});
  BlockInputs block = std::exchange(c.block_inputs, BlockInputs{});
  Case out = with_upstream_gradient(c, d);
  out.core_inputs = std::move(core);
  out.block_inputs = std::move(block);
  return out;
}

// `owned`: the same case as `c` when the caller hands it over; its inputs are
// then taken rather than copied where the source values are not needed again.
Judgement judge(AttachedKernel& k, const Case& c, Case* owned, const JudgeOptions& opt, const std::string& replay) {
  const KernelDeclaration& d = k.declaration();
  Judgement j;
  CaseRecord& rec = j.record;
  rec.name = c.name;
  rec.family = c.provenance.family;
  rec.seed = c.provenance.seed;
  rec.level = c.level == Level::core ? "core" : "block";
  rec.shape = shape_text(c);
  rec.kv_len = c.level == Level::core ? c.core.shape.kv_len : c.block.shape.kv_len;
  rec.mask = std::string(mask_kind_name(c.level == Level::core ? c.core.mask.kind : c.block.mask.kind));
  rec.format = std::string(format_name(d.input_format));
  rec.replay = replay;
  rec.logit_scale = logit_scale(c);
  rec.figures.ratio_to_plain = std::numeric_limits<double>::quiet_NaN();

  if (auto why = why_unfit(c, d)) {
    j.unfit = *why;
    return j;
  }
  // A backward kernel is given dO: the case's own, else the generated one.
  // The source values are needed again only for the input-quantisation split.
  const bool rounded = d.input_format != c.source_format && d.input_format != Format::float64;
  const bool split = opt.quantisation_split && rounded;
  ReceivedCase rc =  // the leak probes poison it in place and restore it (faults.h)
      owned != nullptr && !split ? receive(taken_for_receive(*owned, d), d) : receive(with_upstream_gradient(c, d), d);
  if (const auto bad = first_non_finite_input(rc.received); !bad.empty()) {
    j.unfit = bad + " overflows " + std::string(format_name(d.input_format)) + " when rounded";
    return j;
  }

  const KernelRun first = k.run(rc, opt.detect.run);
  if (first.status != RunStatus::ok) {
    // Only the status is judged: there is no output to score or probe.
    if (auto f = fault_of(first.status)) j.faults.faults.push_back({*f, first.detail, {}, 1, -1});
    if (first.status == RunStatus::bad_output) {
      j.faults.bad_output_runs = 1;
      j.faults.bad_output_detail = first.detail;
    }
    if (first.status == RunStatus::unsupported) {
      j.faults.unsupported_runs = 1;
      j.unfit = "declined by the kernel (" + (first.detail.empty() ? std::string("unsupported") : first.detail) +
                "): not run, not a fault";
    }
    record_faults(rec, j.faults);
    return j;
  }

  // A long case's reference judges a deterministic sample of rows (sample_rows);
  // the detectors below share the sample, and every row is still checked for
  // non-finite output and the masked-row convention.
  DetectorOptions detect = opt.detect;
  if (c.level == Level::core) {
    detect.reference.rows = sample_rows(c.core.shape);
    detect.max_leak_patterns = leak_patterns_for(c.core.shape, detect.max_leak_patterns);
  }
  const AnyReference ref = reference_of(rc.received, detect.reference);
  j.score = score_of(first, ref, d.output_format);
  condition_on_scores(*j.score, rc.received);
  if (d.p_quant) condition_on_p_rounding(*j.score, rc.received, *d.p_quant, d.p_scale);
  fill_figures(rec.figures, *j.score);
  rec.ulp_histogram.assign(j.score->ulp_histogram.begin(), j.score->ulp_histogram.end());
  rec.reference_certified = j.score->reference_certified;  // explained once per report, not per case

  if (!detect.reference.rows.empty()) {
    const auto judged = std::count(detect.reference.rows.begin(), detect.reference.rows.end(), std::uint8_t{1});
    rec.fault_details.push_back("note: scored " + std::to_string(judged) + " of " +
                                std::to_string(detect.reference.rows.size()) +
                                " query rows (a deterministic sample); every row checked for faults");
  }
  j.faults = faults_of(k, rc, first, ref, detect);
  if (ref.core && d.split_kv_len > 0 && !first.o_partials.values.empty()) {
    const SplitJudgement split = judge_splits(first, rc, d.split_kv_len, d.output_format, detect.reference);
    for (const auto& f : {split.partial, split.merge})
      if (f) j.faults.faults.push_back(*f);
  }
  // The backward needs the exact O of every row (it is fed them): not judged on a row-sampled case.
  if (d.backward && ref.core && detect.reference.rows.empty()) judge_backward(k, rc, c, first, *ref.core, opt, j);
  if (d.backward && ref.core && !detect.reference.rows.empty())
    j.faults.notes.push_back("gradients not judged: a production-sized case whose forward reference samples rows");
  record_faults(rec, j.faults);

  // What rounding or quantising the inputs cost, apart from the kernel's arithmetic.
  if (split) {
    const AnyReference src = reference_of(c, detect.reference);
    const QuantSplit split = ref.core ? split_quantisation(first.out, nullptr, *ref.core, *src.core, d.output_format)
                                      : split_quantisation(first.out, *ref.block, *src.block, d.output_format);
    rec.figures.input_error = split.input.max_scaled_error;
  }
  // What rounding P to 8 bits costs, as the kernel declares it (p_quant).
  if (opt.quantisation_split && d.p_quant && ref.core) {
    const Tensor modelled = p_rounded_attention(rc.received.core, rc.received.core_inputs, *d.p_quant, d.p_scale,
                                                d.fp8_saturating);
    rec.figures.p_rounding_error = score_core(modelled, nullptr, *ref.core, d.output_format).max_scaled_error;
  }

  if (opt.plain && (opt.plain == &k || opt.plain->declaration().name == d.name)) {
    // The kernel is its own plain kernel (e.g. the only bundled int8 kernel):
    // the ratio is 1 by construction, so it passes and no figure is shown.
    j.ratio = PlainRatio{1.0, 1.0};
  } else if (opt.plain && receives_alike(opt.plain->declaration(), d) &&
      !why_unfit(c, opt.plain->declaration())) {
    const KernelRun plain = opt.plain->run(rc, opt.detect.run);
    if (plain.status == RunStatus::ok) {
      const CaseScore ps = score_of(plain, ref, d.output_format);
      if (ps.non_finite == 0) {
        j.ratio = ratio_to_plain(*j.score, ps);
        rec.figures.ratio_to_plain = j.ratio->max_scaled_error;
      }
    }
  }
  return j;
}

}  // namespace

Judgement judge_case(AttachedKernel& k, const Case& c, const JudgeOptions& opt, const std::string& replay) {
  return judge(k, c, nullptr, opt, replay);
}

Judgement judge_case(AttachedKernel& k, Case&& c, const JudgeOptions& opt, const std::string& replay) {
  return judge(k, c, &c, opt, replay);
}

}  // namespace headroom
