// headroom — what a suite covers, from its requests' outlines (suite.h); user shapes and family filters.
#include <algorithm>
#include <map>
#include <set>

#include "headroom/families.h"
#include "headroom/format.h"
#include "headroom/input_error.h"
#include "headroom/suite.h"
#include "suite_builder.h"

namespace headroom {

std::vector<CaseRequest> shape_requests(const std::vector<CoreShape>& shapes, int seeds) {
  generate_internal::SuiteBuilder b;
  std::uint64_t seed = 1;
  for (const CoreShape& s : shapes)
    for (std::string_view f : generate_internal::kShapeFamilies)
      for (int k = 0; k < seeds; ++k, ++seed) {
        b.add(f, seed, kDefaultSize, s);
        CaseRequest own;
        own.family = std::string(f);
        own.seed = seed;
        own.shape = s;
        if (case_outline(own).mask != MaskKind::causal_bottom_right)
          b.add(f, seed, kDefaultSize, s, MaskKind::causal_bottom_right);
      }
  return b.take();
}

std::vector<CaseRequest> only_families(std::vector<CaseRequest> requests, const std::vector<std::string>& families) {
  if (families.empty()) return requests;
  for (const std::string& f : families)
    if (!find_family(f)) {
      std::string names;
      for (const FamilyInfo& i : kFamilies) names += (names.empty() ? "" : ", ") + std::string(i.name);
      throw InputError("command line", "--family " + f, "is no generator family", "use one of: " + names);
    }
  std::erase_if(requests, [&](const CaseRequest& r) {
    return std::find(families.begin(), families.end(), r.family) == families.end();
  });
  return requests;
}

SuiteCoverage suite_coverage(const std::vector<CaseRequest>& requests) {
  SuiteCoverage c;
  std::set<std::pair<std::int64_t, std::int64_t>> dims;
  std::set<std::int64_t> groups;
  std::set<MaskKind> masks;
  std::set<std::string> fams;
  std::map<std::string, std::size_t> per_feature;
  for (const CaseRequest& r : requests) {
    if (const FamilyInfo* f = find_family(r.family); f && !f->feature.empty()) ++per_feature[std::string(f->feature)];
    const CaseOutline o = case_outline(r);
    const CoreShape& s = o.shape;
    ++c.cases;
    if (o.level == Level::block) ++c.block_cases;
    c.max_kv_len = std::max(c.max_kv_len, s.kv_len);
    c.max_q_len = std::max(c.max_q_len, s.q_len);
    c.max_batch = std::max(c.max_batch, s.batch);
    if (s.kv_len >= 4096) ++c.long_cases;
    dims.insert({s.key_dim, s.value_dim});
    groups.insert(s.q_heads / s.kv_heads);
    masks.insert(o.mask);
    fams.insert(r.family);
  }
  for (auto [dk, dv] : dims) {
    if (std::min(dk, dv) < kProductionHeadDim) {
      ++c.small_head_dims;
      c.largest_small_dim = std::max({c.largest_small_dim, dk, dv});
      if (dk % 8 != 0 || dv % 8 != 0) ++c.odd_head_dims;
      continue;
    }
    c.head_dims.push_back(dk == dv ? std::to_string(dk) : std::to_string(dk) + "/" + std::to_string(dv));
  }
  c.group_sizes.assign(groups.begin(), groups.end());
  for (MaskKind m : masks) c.masks.emplace_back(mask_kind_name(m));
  for (const FamilyInfo& f : kFamilies) {
    if (fams.count(std::string(f.name))) c.families.emplace_back(f.name);
    if (auto it = per_feature.find(std::string(f.feature)); it != per_feature.end()) {
      c.features.emplace_back(it->first, it->second);
      per_feature.erase(it);
    }
  }
  return c;
}

namespace {

// Every input format a kernel may declare (format.h), in its own order.
std::string format_list() {
  std::string out;
  for (Format f : {Format::float64, Format::float32, Format::binary16, Format::bfloat16, Format::int8, Format::e4m3,
                   Format::e5m2})
    out += (out.empty() ? "" : ", ") + std::string(format_name(f));
  return out;
}

}  // namespace

std::vector<std::string> coverage_text(const SuiteCoverage& c) {
  auto join = [](const auto& v) {
    std::string out;
    for (const auto& x : v) {
      if (!out.empty()) out += ", ";
      if constexpr (std::is_same_v<std::decay_t<decltype(x)>, std::string>)
        out += x;
      else
        out += std::to_string(x);
    }
    return out;
  };
  std::string features;
  for (const auto& [name, n] : c.features)
    features += (features.empty() ? "" : ", ") + name + " " + std::to_string(n) +
                (name == "paged_kv" ? " (decode, Tq 1 to 8)" : "");
  if (features.empty()) features = "none";
  return {
      "cases: " + std::to_string(c.cases) + " (" + std::to_string(c.block_cases) + " block level, " +
          std::to_string(c.long_cases) + " with Tk >= 4096)",
      "largest Tk: " + std::to_string(c.max_kv_len) + "; largest Tq: " + std::to_string(c.max_q_len) +
          "; largest batch: " + std::to_string(c.max_batch),
      "head dims (Dk or Dk/Dv) from 64: " + (c.head_dims.empty() ? std::string("none") : join(c.head_dims)) +
          "; and " + std::to_string(c.small_head_dims) + " smaller pairs up to " + std::to_string(c.largest_small_dim) +
          " (" + std::to_string(c.odd_head_dims) + " with a dim not a multiple of 8)",
      "group sizes (Hq/Hkv): " + join(c.group_sizes),
      "masks: " + join(c.masks),
      "families: " + std::to_string(c.families.size()) + " of " + std::to_string(std::size(kFamilies)),
      "inference features (kernel_abi.h v2, only for kernels declaring them): " + features +
          "; split-KV partials judged on every case of a kernel writing them",
      "formats: the kernel's own, each case rounded or quantised to the input format it declares: " + format_list() +
          " (scales per tensor, head, token, channel or block as declared)",
  };
}

}  // namespace headroom
