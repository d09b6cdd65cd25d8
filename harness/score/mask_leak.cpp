// headroom — the mask-leak detector: re-runs with poisoned masked keys, compared bit for bit (faults.h).
//
// Only keys masked for a row may be poisoned when that row is checked: a key
// masked for one query may be visible to another (causal masks), and poisoning
// it changes the other's output legitimately. So probes are sets S of keys,
// one per distinct "masked set" of a row; a probe checks exactly the rows whose
// masked set contains S. Key padding has one set per batch (one probe covers
// every row), causal masks one per query row, dense masks up to one per row.
#include <algorithm>
#include <array>
#include <cmath>
#include <cstdio>
#include <cstring>
#include <map>
#include <string>

#include "headroom/faults.h"
#include "headroom/fp8.h"
#include "headroom/scores.h"
#include "headroom/varlen.h"
#include "leak_poison.h"

namespace headroom {
namespace {

enum class Variant : unsigned char { v_only, k_plus, k_minus };

struct Group {
  std::int64_t b = 0, g = -1;                       // core: batch and kv head; block: g = −1
  std::vector<std::int64_t> heads;                  // core: the query heads of kv head g; block: {-1}
  std::vector<std::array<std::int64_t, 2>> rows;    // (h, i)
  std::vector<std::vector<std::uint8_t>> masked;    // per row: masked[j]
  std::vector<std::vector<std::int64_t>> patterns;  // distinct non-empty masked sets, largest first
};

std::vector<Group> build_groups(const ReceivedCase& c) {
  const bool block = c.received.level == Level::block;
  const CoreShape s = block ? c.received.block.shape.core() : c.received.core.shape;
  const Mask& m = block ? c.received.block.mask : c.received.core.mask;
  std::vector<Group> groups;
  for (std::int64_t b = 0; b < s.batch; ++b) {
    for (std::int64_t g = 0; g < (block ? 1 : s.kv_heads); ++g) {
      Group gr;
      gr.b = b;
      gr.g = block ? -1 : g;
      for (std::int64_t h = 0; h < s.q_heads; ++h)
        if (block || kv_head_of(s, h) == g) gr.heads.push_back(h);
      std::map<std::vector<std::uint8_t>, std::size_t> seen;
      const std::vector<std::int64_t> row_heads = block ? std::vector<std::int64_t>{-1} : gr.heads;
      for (std::int64_t h : row_heads) {
        for (std::int64_t i = 0; i < s.q_len; ++i) {
          std::vector<std::uint8_t> mk(static_cast<std::size_t>(s.kv_len));
          bool any = false;
          for (std::int64_t j = 0; j < s.kv_len; ++j) {
            bool hidden = true;
            if (block) {
              for (std::int64_t hh = 0; hh < s.q_heads && hidden; ++hh) hidden = !m.visible(s, b, hh, i, j);
            } else {
              hidden = !m.visible(s, b, h, i, j);
            }
            mk[static_cast<std::size_t>(j)] = hidden ? 1 : 0;
            any = any || hidden;
          }
          gr.rows.push_back({h, i});
          if (any && seen.emplace(mk, 0).second) {
            std::vector<std::int64_t> js;
            for (std::int64_t j = 0; j < s.kv_len; ++j)
              if (mk[static_cast<std::size_t>(j)]) js.push_back(j);
            gr.patterns.push_back(std::move(js));
          }
          gr.masked.push_back(std::move(mk));
        }
      }
      std::stable_sort(gr.patterns.begin(), gr.patterns.end(),
                       [](const auto& x, const auto& y) { return x.size() > y.size(); });
      groups.push_back(std::move(gr));
    }
  }
  return groups;
}

double poison_of(const Tensor& t, Format f) { return score_detail::leak_poison(t, f); }

// int8: the code farthest from the zero point in the wanted direction;
// e4m3/e5m2: ±the largest finite value (fp8.h).
std::int8_t extreme_code(const QuantizedTensor& q, std::int64_t group, bool positive) {
  if (is_fp8(q.format)) {
    const unsigned max_bits = q.format == Format::e4m3 ? 0x7Eu : 0x7Bu;
    return static_cast<std::int8_t>(positive ? max_bits : max_bits | 0x80u);
  }
  const std::int32_t z = q.zero_points.empty() ? 0 : q.zero_points[static_cast<std::size_t>(group)];
  const std::int8_t lowest = q.scheme.asymmetric ? -128 : -127;
  if (positive) return z < 127 ? std::int8_t{127} : lowest;
  return z > lowest ? lowest : std::int8_t{127};
}

// Poisons masked keys of a case in place: each row it overwrites (K, V or
// X_kv values, and int8/8-bit codes) is saved first, and restore() (or the
// destructor) puts every saved row back bit for bit, so the detector holds no
// second copy of the case. Rows of float32, binary16 and bfloat16 inputs are
// saved as float (exact: every such value is a float), others as double.
class Poisoner {
 public:
  explicit Poisoner(ReceivedCase& c) : c_(c) {
    const bool block = c.received.level == Level::block;
    const Format f = c.input_format;
    if (block) {
      px_ = poison_of(c.received.block_inputs.x_kv, f);
    } else {
      if (!is_quantised(f)) {
        pk_ = poison_of(c.received.core_inputs.k, f);
        pv_ = poison_of(c.received.core_inputs.v, f);
      }
      for (double v : c.received.core_inputs.v.values) v_max_ = std::max(v_max_, std::fabs(v));
    }
    if (!block && c.received.core.paged.active()) shared_ = c.received.core.paged.sharers();
  }
  Poisoner(const Poisoner&) = delete;
  Poisoner& operator=(const Poisoner&) = delete;
  ~Poisoner() { restore(); }

  // How many doublings the value poison (P_V; block: P) can take and stay
  // finite in the input format; 0 for int8 and 8-bit float inputs, whose
  // poison is already the extreme code.
  int growth_room() const {
    const double p = c_.received.level == Level::block ? px_ : pv_;
    if (p == 0) return 0;
    return score_detail::leak_poison_cap_log2(c_.input_format) - std::ilogb(p);
  }

  // Largest |V| of the unpoisoned case, and largest |V| written as poison
  // since the last restore(): their sum bounds how far any poisoned V moved.
  double v_max() const { return v_max_; }
  double v_poison_max() const { return v_poison_max_; }

  // Poisons keys `js` of group `gr`, with the value poison (block: the X_kv
  // poison) times 2^grow.
  void apply(const Group& gr, const std::vector<std::int64_t>& js, Variant var, int grow = 0) {
    if (c_.received.level == Level::block) {
      Tensor& x = c_.received.block_inputs.x_kv;
      const double p = std::ldexp(var == Variant::k_minus ? -px_ : px_, grow);
      for (std::int64_t j : js) {
        const std::size_t at = static_cast<std::size_t>(x.offset(gr.b, j, 0));
        save(x, nullptr, at, static_cast<std::size_t>(x.shape[2]));
        std::fill_n(x.values.begin() + static_cast<std::ptrdiff_t>(at), x.shape[2], p);
      }
      return;
    }
    CoreInputs& in = c_.received.core_inputs;
    const bool poison_k = var != Variant::v_only;
    const PagedKv& paged = c_.received.core.paged;
    for (std::int64_t j : js) {
      // A page several sequences share holds one content for all of them:
      // poisoning it for one would move the others' visible keys.
      if (paged.active() && shared_[static_cast<std::size_t>(std::max(0, paged.page(gr.b, j / paged.page_size)))] > 1)
        continue;
      save_row(false, gr.b, gr.g, j);
      for (std::int64_t d = 0; d < in.v.shape[3]; ++d) set(false, gr.b, gr.g, j, d, true, grow);
      if (!poison_k) continue;
      save_row(true, gr.b, gr.g, j);
      for (std::int64_t d = 0; d < in.k.shape[3]; ++d) set(true, gr.b, gr.g, j, d, var == Variant::k_plus, 0);
    }
  }

  // Puts every row poisoned since the last restore back as it was.
  void restore() {
    for (auto it = saved_.rbegin(); it != saved_.rend(); ++it) {
      const auto to = it->tensor->values.begin() + static_cast<std::ptrdiff_t>(it->at);
      std::copy(it->values.begin(), it->values.end(), to);
      std::copy(it->narrow.begin(), it->narrow.end(), to);
      if (it->codes != nullptr)
        std::copy(it->old_codes.begin(), it->old_codes.end(), it->codes->begin() + static_cast<std::ptrdiff_t>(it->at));
    }
    saved_.clear();
    v_poison_max_ = 0;
  }

 private:
  struct Saved {
    Tensor* tensor;
    std::vector<std::int8_t>* codes;  // int8 / 8-bit codes beside the values, or null
    std::size_t at;
    std::vector<double> values;  // or, for inputs every float holds exactly:
    std::vector<float> narrow;
    std::vector<std::int8_t> old_codes;
  };

  void save(Tensor& t, std::vector<std::int8_t>* codes, std::size_t at, std::size_t width) {
    Saved s{&t, codes, at, {}, {}, {}};
    const auto from = static_cast<std::ptrdiff_t>(at), to = static_cast<std::ptrdiff_t>(at + width);
    const Format f = c_.input_format;
    if (f == Format::float32 || f == Format::binary16 || f == Format::bfloat16)
      s.narrow.assign(t.values.begin() + from, t.values.begin() + to);
    else
      s.values.assign(t.values.begin() + from, t.values.begin() + to);
    if (codes != nullptr) s.old_codes.assign(codes->begin() + from, codes->begin() + to);
    saved_.push_back(std::move(s));
  }

  void save_row(bool key, std::int64_t b, std::int64_t g, std::int64_t j) {
    Tensor& t = key ? c_.received.core_inputs.k : c_.received.core_inputs.v;
    std::optional<QuantizedTensor>& q = key ? c_.k8 : c_.v8;
    save(t, is_quantised(c_.input_format) ? &q->codes : nullptr, static_cast<std::size_t>(t.offset(b, g, j, 0)),
         static_cast<std::size_t>(t.shape[3]));
  }

  void set(bool key, std::int64_t b, std::int64_t g, std::int64_t j, std::int64_t d, bool positive, int grow) {
    Tensor& t = key ? c_.received.core_inputs.k : c_.received.core_inputs.v;
    const std::size_t at = static_cast<std::size_t>(t.offset(b, g, j, d));
    if (!is_quantised(c_.input_format)) {
      t.values[at] = key ? (positive ? pk_ : -pk_) : std::ldexp(pv_, grow);
      if (!key) v_poison_max_ = std::max(v_poison_max_, std::fabs(t.values[at]));
      return;
    }
    QuantizedTensor& q = key ? *c_.k8 : *c_.v8;
    const std::int64_t grp = q.group(b, g, j, d);
    const std::int8_t code = extreme_code(q, grp, positive);
    q.codes[at] = code;
    if (is_fp8(q.format)) {
      const Fp8Kind kind = q.format == Format::e4m3 ? Fp8Kind::e4m3 : Fp8Kind::e5m2;
      // ≤ 4 significant bits times a 24-bit scale: exact (quant.h).
      t.values[at] = fp8_to_double(static_cast<std::uint8_t>(code), kind) * static_cast<double>(q.scales[static_cast<std::size_t>(grp)]);
    } else {
      const std::int32_t z = q.zero_points.empty() ? 0 : q.zero_points[static_cast<std::size_t>(grp)];
      // Exact: |c − z| < 2^9 times a 24-bit scale (quant.h).
      t.values[at] = static_cast<double>(code - z) * static_cast<double>(q.scales[static_cast<std::size_t>(grp)]);
    }
    if (!key) v_poison_max_ = std::max(v_poison_max_, std::fabs(t.values[at]));
  }

  ReceivedCase& c_;
  double pk_ = 0, pv_ = 0, px_ = 0, v_max_ = 0, v_poison_max_ = 0;
  std::vector<Saved> saved_;
  std::vector<int> shared_;  // paged: how many sequences name each page
};

bool same_or_zero(double a, double b) {
  if (a == 0 && b == 0) return true;  // ±0: 0·v reads a masked v but leaks no mass
  return std::memcmp(&a, &b, sizeof a) == 0;
}

struct RowRef {
  std::size_t out_begin, width;  // the row's span in out
  std::int64_t lse_at;           // −1 when none
};

RowRef row_ref(const ReceivedCase& c, const Group& gr, std::size_t r) {
  const auto [h, i] = gr.rows[r];
  if (c.received.level == Level::block) {
    const BlockShape& s = c.received.block.shape;
    return {static_cast<std::size_t>((gr.b * s.q_len + i) * s.model_dim), static_cast<std::size_t>(s.model_dim), -1};
  }
  const CoreShape& s = c.received.core.shape;
  const std::int64_t row = (gr.b * s.q_heads + h) * s.q_len + i;
  return {static_cast<std::size_t>(row * s.value_dim), static_cast<std::size_t>(s.value_dim), row};
}

bool row_changed(const KernelRun& base, const KernelRun& run, const RowRef& rr) {
  for (std::size_t k = rr.out_begin; k < rr.out_begin + rr.width; ++k)
    if (!same_or_zero(base.out.values[k], run.out.values[k])) return true;
  if (rr.lse_at >= 0 && !base.lse.values.empty()) {
    const std::size_t k = static_cast<std::size_t>(rr.lse_at);
    if (!same_or_zero(base.lse.values[k], run.lse.values[k])) return true;
  }
  return false;
}

// The largest change of row rr from `base` to `run`, and the row's largest
// magnitude in either (lse counted too); a change is +inf when an element
// became or stopped being non-finite.
struct RowChange {
  double delta = 0, top = 0;
};
RowChange row_change(const KernelRun& base, const KernelRun& run, const RowRef& rr) {
  RowChange ch;
  auto add = [&](double a, double b) {
    if (!std::isfinite(a) || !std::isfinite(b)) {
      if (!same_or_zero(a, b)) ch.delta = INFINITY;
      return;
    }
    ch.delta = std::max(ch.delta, std::fabs(a - b));
    ch.top = std::max({ch.top, std::fabs(a), std::fabs(b)});
  };
  for (std::size_t k = rr.out_begin; k < rr.out_begin + rr.width; ++k) add(base.out.values[k], run.out.values[k]);
  if (rr.lse_at >= 0 && !base.lse.values.empty())
    add(base.lse.values[static_cast<std::size_t>(rr.lse_at)], run.lse.values[static_cast<std::size_t>(rr.lse_at)]);
  return ch;
}

bool contains(const std::vector<std::uint8_t>& masked, const std::vector<std::int64_t>& js) {
  for (std::int64_t j : js)
    if (!masked[static_cast<std::size_t>(j)]) return false;
  return true;
}

// Certified lower bound on the mass a changed row leaked (V-only run, while
// poisoned; faults.h): a row leaking mass m moves by at most m times the
// largest shift of a poisoned V, itself at most |poison| + max|V|.
double leaked_mass(const Poisoner& p, const KernelRun& before, const KernelRun& after, const RowRef& rr) {
  const double den = p.v_poison_max() + p.v_max();
  double mass = 0;
  for (std::size_t d = 0; d < rr.width; ++d) {
    const double delta = std::fabs(after.out.values[rr.out_begin + d] - before.out.values[rr.out_begin + d]);
    if (den > 0 && std::isfinite(delta)) mass = std::max(mass, delta / den);
  }
  return mass;
}

// Where a paged key lives: " (page P row r, past sequence b's length L)".
std::string page_text(const ReceivedCase& c, std::int64_t b, std::int64_t j) {
  const PagedKv& p = c.received.core.paged;
  if (c.received.level != Level::core || !p.active()) return "";
  const std::int32_t page = p.page(b, j / p.page_size);
  const std::int64_t len = c.received.core.mask.kv_end(c.received.core.shape, b);
  return " (page " + std::to_string(page) + " row " + std::to_string(j % p.page_size) +
         (j >= len ? ", past sequence " + std::to_string(b) + "'s length " + std::to_string(len) : std::string()) + ")";
}

std::string variant_text(Variant v, bool block) {
  if (block) return v == Variant::k_minus ? "masked X_kv rows set to -P" : "masked X_kv rows set to +P";
  switch (v) {
    case Variant::v_only: return "masked V set to P_V";
    case Variant::k_plus: return "masked K set to +P_K (V to P_V)";
    case Variant::k_minus: return "masked K set to -P_K (V to P_V)";
  }
  return "";
}

}  // namespace

std::optional<Fault> detect_mask_leak(AttachedKernel& kernel, ReceivedCase& c, const KernelRun& baseline,
                                      const DetectorOptions& opt, int* runs, std::vector<std::string>* notes) {
  const bool block = c.received.level == Level::block;
  const std::vector<Group> groups = build_groups(c);
  std::size_t most = 0;
  for (const Group& g : groups) most = std::max(most, g.patterns.size());
  if (most == 0 || opt.max_leak_patterns < 1) return std::nullopt;
  const std::size_t probes = std::min(most, static_cast<std::size_t>(opt.max_leak_patterns));
  if (probes < most && notes != nullptr) {
    notes->push_back("mask_leak: probed " + std::to_string(probes) + " of " + std::to_string(most) +
                     " distinct masked-key sets, evenly spread");
  }
  Poisoner poisoner(c);  // restores c when this returns, however it returns
  const std::vector<Variant> variants =
      block ? std::vector<Variant>{Variant::k_plus, Variant::k_minus}
            : std::vector<Variant>{Variant::v_only, Variant::k_plus, Variant::k_minus};

  // The pattern of group `gr` probed at step t, or −1.
  auto pattern_at = [&](const Group& gr, std::size_t t) -> std::ptrdiff_t {
    const std::size_t n = gr.patterns.size();
    if (n <= probes) return t < n ? static_cast<std::ptrdiff_t>(t) : -1;
    if (probes == 1) return 0;
    return static_cast<std::ptrdiff_t>((t * (n - 1) + (probes - 1) / 2) / (probes - 1));
  };
  auto call = [&]() {
    KernelRun r = kernel.run(c, opt.run);
    if (runs != nullptr) ++*runs;
    return r;
  };
  // Poisons every group's keys of probe step t.
  auto poison_all = [&](std::size_t t, Variant var, int grow) {
    for (const Group& gr : groups) {
      const std::ptrdiff_t p = pattern_at(gr, t);
      if (p >= 0) poisoner.apply(gr, gr.patterns[static_cast<std::size_t>(p)], var, grow);
    }
  };
  // One call with group gr's keys js poisoned, the case restored after it.
  auto call_poisoned = [&](const Group& gr, const std::vector<std::int64_t>& js, Variant var) {
    poisoner.apply(gr, js, var);
    KernelRun r = call();
    poisoner.restore();
    return r;
  };
  auto broken = [&](const KernelRun& r, Variant var) -> std::optional<Fault> {
    if (r.status == RunStatus::ok && r.out.shape == baseline.out.shape && r.lse.shape == baseline.lse.shape) {
      return std::nullopt;
    }
    Fault f;
    f.kind = FaultClass::mask_leak;
    f.count = 1;
    f.detail = "with " + variant_text(var, block) + " the run ended " + run_status_name(r.status) +
               (r.detail.empty() ? "" : ": " + r.detail) + " (run 1: ok)";
    return f;
  };

  for (std::size_t t = 0; t < probes; ++t) {
    for (Variant var : variants) {
      poison_all(t, var, 0);
      const KernelRun run = call();
      if (auto f = broken(run, var)) return f;

      std::int64_t changed = 0;
      const Group* first_group = nullptr;
      std::size_t first_row = 0;
      double mass = 0;
      for (const Group& gr : groups) {
        const std::ptrdiff_t p = pattern_at(gr, t);
        if (p < 0) continue;
        const std::vector<std::int64_t>& js = gr.patterns[static_cast<std::size_t>(p)];
        for (std::size_t r = 0; r < gr.rows.size(); ++r) {
          if (!contains(gr.masked[r], js)) continue;
          const RowRef rr = row_ref(c, gr, r);
          if (!row_changed(baseline, run, rr)) continue;
          if (changed++ == 0) first_group = &gr, first_row = r;
          if (var == Variant::v_only) mass = std::max(mass, leaked_mass(poisoner, baseline, run, rr));
        }
      }
      const KernelRun again = changed > 0 ? call() : KernelRun{};
      poisoner.restore();
      if (changed == 0) continue;

      const Group& gr = *first_group;
      const RowRef rr = row_ref(c, gr, first_row);
      const auto [h0, i0] = gr.rows[first_row];
      const Mask& case_mask = block ? c.received.block.mask : c.received.core.mask;
      const bool varlen = !block && case_mask.is_varlen();
      // A packed batch names the sequence and the row's place in it (varlen.h).
      const std::string first_text =
          block    ? "(b=" + std::to_string(gr.b) + ", i=" + std::to_string(i0) + ")"
          : varlen ? "(h=" + std::to_string(h0) + ", i=" + std::to_string(i0) + ": " + row_place(case_mask, i0) + ")"
                   : "(b=" + std::to_string(gr.b) + ", h=" + std::to_string(h0) + ", i=" + std::to_string(i0) + ")";
      // A leak reproduces: the same poisoned call gives the same row again,
      // and the unpoisoned call still gives the baseline's. A kernel whose
      // output varies between identical calls fails one of the two, and is
      // reported by the nondeterminism detector, not as a leak.
      const KernelRun base_again = call();
      if (auto f = broken(again, var)) return f;
      if (auto f = broken(base_again, var)) return f;
      if (row_changed(run, again, rr) || row_changed(baseline, base_again, rr)) {
        Fault f;
        f.kind = FaultClass::nondeterministic;
        f.count = 1;
        f.where = block ? std::vector<std::int64_t>{gr.b, i0} : std::vector<std::int64_t>{gr.b, h0, i0};
        f.detail = "identical calls gave different outputs for row " + first_text + " (" +
                   (row_changed(baseline, base_again, rr) ? "the unpoisoned input, called again"
                                                          : "the input with " + variant_text(var, block) + ", called twice") +
                   "), seen by the mask-leak probe, which therefore counts no leak";
        return f;
      }
      // A change of rounding size must grow with the poison. A kernel that
      // reads a masked value v moves its row by about mass·v: 2^grow times
      // the poison moves it 2^grow times as far. A racy kernel's jitter (a few
      // ulps of the output, racy_reduction) can also reproduce twice by
      // chance, but it does not grow. Inputs whose poison cannot grow by 2^6
      // (int8, 8-bit floats, binary16 near its cap) skip this and count any
      // reproducible change.
      const RowChange seen = row_change(baseline, run, rr);
      const int grow = std::min(16, poisoner.growth_room());
      if (seen.delta <= 8 * unit_roundoff(kernel.declaration().output_format) * seen.top && grow >= 6) {
        poison_all(t, var, grow);
        const KernelRun grown = call();
        poisoner.restore();
        if (auto f = broken(grown, var)) return f;
        if (row_change(baseline, grown, rr).delta < std::ldexp(seen.delta, grow - 2)) {
          if (notes != nullptr) {
            notes->push_back("mask_leak: row " + first_text + " moved by a rounding-sized amount with " +
                             variant_text(var, block) + ", but not 2^" + std::to_string(grow - 2) +
                             " times as far with a 2^" + std::to_string(grow) +
                             " times larger poison: read as rounding jitter, not counted");
          }
          continue;
        }
      }
      const std::vector<std::int64_t>& own = gr.patterns[static_cast<std::size_t>(pattern_at(gr, t))];
      if (!block) {
        // Its own kv head's masked keys, or another head's? A row that does not
        // move when only its own head's keys are poisoned reads another head.
        const KernelRun r_own = call_poisoned(gr, own, var);
        if (auto f = broken(r_own, var)) return f;
        if (!row_changed(baseline, r_own, rr)) {
          Fault f;
          f.kind = FaultClass::convention;
          f.count = changed;
          f.where = {gr.b, h0, i0};
          f.detail = "row " + first_text + " of kv head " + std::to_string(gr.g) +
                     " does not move when that head's masked keys are poisoned, but does when other heads' are: "
                     "it reads the K/V of another head (grouped-query head order not as declared, Hq/Hkv = " +
                     std::to_string(gr.heads.size()) + ")";
          for (const Group& other : groups) {
            const std::ptrdiff_t p = pattern_at(other, t);
            if (&other == &gr || other.b != gr.b || p < 0) continue;
            const KernelRun r_other = call_poisoned(other, other.patterns[static_cast<std::size_t>(p)], var);
            if (r_other.status == RunStatus::ok && r_other.out.shape == baseline.out.shape &&
                r_other.lse.shape == baseline.lse.shape && row_changed(baseline, r_other, rr)) {
              f.detail += "; it moves with kv head " + std::to_string(other.g) + "'s keys";
              break;
            }
          }
          return f;
        }
      }

      // Bisect the probe set on the first changed row, poisoning its group only.
      std::vector<std::int64_t> cand = own;
      while (cand.size() > 1) {
        const auto half = static_cast<std::ptrdiff_t>(cand.size() / 2);
        std::vector<std::int64_t> lower(cand.begin(), cand.begin() + half), upper(cand.begin() + half, cand.end());
        bool found = false;
        for (auto* part : {&lower, &upper}) {
          const KernelRun r2 = call_poisoned(gr, *part, var);
          if (r2.status == RunStatus::ok && r2.out.shape == baseline.out.shape && r2.lse.shape == baseline.lse.shape &&
              row_changed(baseline, r2, rr)) {
            cand = *part;
            found = true;
            break;
          }
        }
        if (!found) break;  // only several keys together move the row
      }

      Fault f;
      f.kind = FaultClass::mask_leak;
      f.count = changed;
      const std::string& row_text = first_text;
      f.where = block ? std::vector<std::int64_t>{gr.b, i0} : std::vector<std::int64_t>{gr.b, h0, i0};
      if (cand.size() == 1 && varlen) {
        f.where.push_back(cand[0]);
        const bool other = sequence_of_row(case_mask, i0).kv_begin > cand[0] ||
                           sequence_of_row(case_mask, i0).kv_begin + sequence_of_row(case_mask, i0).kv_len <= cand[0];
        f.detail = "masked key j=" + std::to_string(cand[0]) + " (" + key_place(case_mask, cand[0]) + ") changes row " +
                   row_text + (other ? ", which must see only its own sequence's keys" : "");
      } else if (cand.size() == 1) {
        f.where.push_back(cand[0]);
        f.detail = "masked key j=" + std::to_string(cand[0]) + page_text(c, gr.b, cand[0]) + " changes row " + row_text;
      } else {
        f.detail = "masked keys (" + std::to_string(cand.size()) + " together) change row " + row_text;
      }
      f.detail += " with " + variant_text(var, block);
      if (var == Variant::v_only) {
        f.leaked_mass = mass;
        char buf[64];
        std::snprintf(buf, sizeof buf, "; leaked mass >= %.3g", mass);
        f.detail += buf;
      } else if (!block) {
        f.detail += "; masked scores enter the max or the normaliser";
      }
      f.detail += "; " + std::to_string(changed) + " rows changed";
      return f;
    }
  }
  return std::nullopt;
}

}  // namespace headroom
