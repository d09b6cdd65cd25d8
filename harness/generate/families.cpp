// headroom — the family list (families.h) and the table joining it to the implementations.
#include "headroom/families.h"

#include <stdexcept>
#include <string>

#include "recipe.h"

namespace headroom {

std::vector<FamilyInfo> families() { return {std::begin(kFamilies), std::end(kFamilies)}; }

const FamilyInfo* find_family(std::string_view name) {
  for (const FamilyInfo& f : kFamilies)
    if (f.name == name) return &f;
  return nullptr;
}

namespace generate_internal {

std::span<const FamilyImpl> family_impls() {
  // Joined by name once; a documented family without an implementation (or the
  // reverse) is a programming error, caught on first use and by the tests.
  static const std::vector<FamilyImpl> table = [] {
    std::vector<FamilyImpl> all;
    for (auto group : {baseline_families, score_families, activation_families, edge_families, window_families,
                        fp8_families,
                        score_feature_families, varlen_families, paged_families, gradient_families})
      for (FamilyImpl& f : group()) all.push_back(f);
    std::vector<FamilyImpl> ordered;
    for (const FamilyInfo& info : kFamilies) {
      std::size_t found = 0;
      for (const FamilyImpl& f : all)
        if (f.name == info.name) {
          ordered.push_back(f);
          ++found;
        }
      if (found != 1)
        throw std::logic_error("family " + std::string(info.name) + " has " + std::to_string(found) +
                               " implementations");
    }
    if (ordered.size() != all.size()) throw std::logic_error("an implemented family is missing from kFamilies");
    return ordered;
  }();
  return table;
}

}  // namespace generate_internal
}  // namespace headroom
