// headroom — what a run tried, what it did not, and what its verdict could mislead about (run_summary.h).
#include <algorithm>
#include <charconv>
#include <set>

#include <fmt/format.h>

#include "headroom/families.h"
#include "headroom/format.h"
#include "headroom/problem.h"
#include "headroom/run_summary.h"

namespace headroom {
namespace {

constexpr MaskKind kMaskKinds[] = {MaskKind::none,        MaskKind::causal_top_left, MaskKind::causal_bottom_right,
                                   MaskKind::key_padding, MaskKind::dense,           MaskKind::bias};
constexpr Format kFormats[] = {Format::float64, Format::float32, Format::binary16, Format::bfloat16,
                               Format::int8,    Format::e4m3,    Format::e5m2};

std::string join(const std::vector<std::string>& items) {
  std::string out;
  for (std::size_t i = 0; i < items.size(); ++i) out += (i ? ", " : "") + items[i];
  return out;
}

template <class Names>
std::vector<std::string> absent(const Names& names, const std::map<std::string, std::size_t>& seen) {
  std::vector<std::string> out;
  for (const auto& n : names)
    if (!seen.count(std::string(n))) out.emplace_back(n);
  return out;
}

// RunRecord::skipped lines are "<case name>: <reason>"; case names hold no ": ".
std::vector<std::pair<std::string, std::size_t>> skipped_reasons(const RunRecord& r) {
  std::map<std::string, std::size_t> count;
  for (const auto& line : r.skipped) {
    const auto at = line.find(": ");
    ++count[at == std::string::npos ? std::string("no reason recorded") : line.substr(at + 2)];
  }
  std::vector<std::pair<std::string, std::size_t>> out(count.begin(), count.end());
  std::stable_sort(out.begin(), out.end(), [](const auto& a, const auto& b) { return a.second > b.second; });
  return out;
}

std::string cases_text(std::size_t n) { return n == 1 ? "1 case" : fmt::format("{} cases", n); }

void add_cautions(const RunRecord& r, Coverage& cov) {
  auto& say = cov.cautions;
  if (r.cases.empty()) {
    say.push_back("No case was run: the verdict says nothing about this kernel.");
    return;
  }
  std::size_t masked = 0;
  for (const auto& [mask, n] : cov.masks)
    if (mask != "none") masked += n;
  if (masked == 0)
    say.push_back("No masked case was tried: causal alignment, key padding, fully masked rows and mask leaks "
                  "are unjudged.");
  else if (!cov.masks_not_tried.empty())
    say.push_back("Mask kinds not tried: " + join(cov.masks_not_tried) + ".");
  if (masked > 0 && cov.ragged_causal == 0)
    say.push_back("No causal case with Tq ≠ Tk: the two causal alignments agree when Tq = Tk, so a kernel with "
                  "the wrong alignment passes.");
  if (!cov.levels.count("block"))
    say.push_back("No block-level case was tried: projections, head split and concatenation are unjudged.");
  if (!cov.levels.count("core"))
    say.push_back("No core-level case was tried: the attention core is judged only through the block.");
  if (!cov.kv_len.empty() && cov.kv_len.high < kLongSequence)
    say.push_back(fmt::format("No long sequence: the longest Tk tried is {} (< {}); error growth with sequence "
                              "length beyond it is not measured.",
                              static_cast<long long>(cov.kv_len.high), static_cast<long long>(kLongSequence)));
  if (cov.grouped_query == 0 && cov.multi_query == 0)
    say.push_back("No grouped-query or multi-query case (Hkv < Hq): the mapping of query heads to shared "
                  "key/value heads is unjudged.");
  if (cov.odd_head_dim == 0 && cov.unparsed_shapes < r.cases.size())
    say.push_back("Every head dimension tried is a multiple of 8: vector tails and partial tiles in the feature "
                  "dimension are unjudged.");
  if (cov.logit_scale.empty() || cov.logit_scale.high <= kFloat32ExpOverflow)
    say.push_back(fmt::format("No case has a scaled score beyond {:.2f} (float32 exp overflow; largest tried: {}): "
                              "a kernel that skips the running-maximum shift could still pass.",
                              kFloat32ExpOverflow, cov.logit_scale.empty() ? "none" : figure_text(cov.logit_scale.high)));
  if (!cov.families_not_tried.empty())
    say.push_back(fmt::format("{} of {} generator families {} not tried: {}.", cov.families_not_tried.size(),
                              families().size(), cov.families_not_tried.size() == 1 ? "was" : "were",
                              join(cov.families_not_tried)));
  if (cov.skipped > 0)
    say.push_back(fmt::format("{} of the suite {} skipped (not run), as listed under coverage: the verdict does not "
                              "cover {}.",
                              cov.skipped == 1 ? "1 case" : fmt::format("{} cases", cov.skipped),
                              cov.skipped == 1 ? "was" : "were", cov.skipped == 1 ? "it" : "them"));
  for (const LevelTake& t : r.level_takes())
    if (t.thin())
      say.push_back(fmt::format("The kernel took {} of the {} {}-level cases (it declined or could not take the rest): "
                                "the verdict covers only those, as the verdict line says.",
                                t.taken, t.of, t.level));
  if (cov.unparsed_shapes > 0)
    say.push_back(fmt::format("{} case(s) carry a shape that does not parse: their extents are not counted above.",
                              cov.unparsed_shapes));
}

}  // namespace

std::string skipped_headline(const RunRecord& r) {
  if (r.skipped.empty()) return {};
  const std::size_t total = r.skipped.size() + r.cases.size();
  std::string out = r.skipped.size() > r.cases.size() ? "MOST OF THE SUITE WAS SKIPPED. " : "";
  out += fmt::format("Skipped {} of {} (not run, outside the kernel's declaration):", r.skipped.size(),
                     cases_text(total));
  const auto reasons = skipped_reasons(r);
  for (std::size_t i = 0; i < reasons.size(); ++i)
    out += fmt::format("{} {}: {}", i ? ";" : "", reasons[i].first, cases_text(reasons[i].second));
  return out + ".";
}

std::optional<ShapeExtents> parse_shape(const std::string& level, const std::string& shape) {
  std::vector<std::int64_t> v;
  const char* p = shape.data();
  const char* end = p + shape.size();
  while (p < end) {
    std::int64_t x = 0;
    auto [next, ec] = std::from_chars(p, end, x);
    if (ec != std::errc{} || x < 1) return std::nullopt;
    v.push_back(x);
    p = next;
    if (p == end) break;
    if (*p != ',') return std::nullopt;
    ++p;
    if (p == end) return std::nullopt;  // a trailing comma
  }
  ShapeExtents s;
  if (level == "core" && v.size() == 7) {
    s = {v[0], v[1], v[2], v[3], v[4], v[5], v[6], 0};
  } else if (level == "block" && v.size() == 8) {
    s.batch = v[0];
    s.q_len = v[1];
    s.kv_len = v[2];
    s.model_dim = v[3];
    s.q_heads = v[4];
    s.kv_heads = v[5];
    s.key_dim = v[6];
    s.value_dim = v[7];
  } else {
    return std::nullopt;
  }
  return s;
}

Coverage coverage(const RunRecord& r) {
  Coverage cov;
  for (const auto& c : r.cases) {
    ++cov.families[c.family];
    ++cov.masks[c.mask];
    ++cov.formats[c.format];
    ++cov.levels[c.level];
    cov.logit_scale.add(c.logit_scale);
    if (c.backward) {
      ++cov.gradients_judged;
      if (c.backward->end_to_end_judged) ++cov.gradients_end_to_end;
      if (c.backward->bias_judged) ++cov.gradients_bias;
      ++cov.upstream[c.backward->upstream];
    }
    const auto s = parse_shape(c.level, c.shape);
    if (!s) {
      ++cov.unparsed_shapes;
      continue;
    }
    cov.batch.add(static_cast<double>(s->batch));
    cov.q_heads.add(static_cast<double>(s->q_heads));
    cov.kv_heads.add(static_cast<double>(s->kv_heads));
    cov.q_len.add(static_cast<double>(s->q_len));
    cov.kv_len.add(static_cast<double>(s->kv_len));
    cov.key_dim.add(static_cast<double>(s->key_dim));
    cov.value_dim.add(static_cast<double>(s->value_dim));
    if (s->model_dim > 0) cov.model_dim.add(static_cast<double>(s->model_dim));
    if (s->key_dim % 8 != 0 || s->value_dim % 8 != 0) ++cov.odd_head_dim;
    if (s->kv_heads < s->q_heads) ++(s->kv_heads == 1 ? cov.multi_query : cov.grouped_query);
    if (s->q_len != s->kv_len) {
      ++cov.ragged;
      if (c.mask == "causal_top_left" || c.mask == "causal_bottom_right") ++cov.ragged_causal;
    }
  }
  cov.skipped = r.skipped.size();
  cov.skipped_reasons = skipped_reasons(r);
  std::vector<std::string> family_names, mask_names, format_names;
  for (const auto& f : families()) family_names.emplace_back(f.name);
  for (MaskKind m : kMaskKinds) mask_names.emplace_back(mask_kind_name(m));
  for (Format f : kFormats) format_names.emplace_back(format_name(f));
  cov.families_not_tried = absent(family_names, cov.families);
  cov.masks_not_tried = absent(mask_names, cov.masks);
  cov.formats_not_tried = absent(format_names, cov.formats);
  cov.levels_not_tried = absent(std::vector<std::string>{"core", "block"}, cov.levels);
  add_cautions(r, cov);
  return cov;
}

}  // namespace headroom
