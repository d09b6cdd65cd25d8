// headroom — the nearest valid name to a misspelt one, for "did you mean" hints.
//
// Used wherever a user types a name headroom must know (a subcommand, an
// option, a kernel named in a budget file): a near miss gets the fix spelled
// out instead of a bare "unknown".
#pragma once

#include <algorithm>
#include <cstddef>
#include <string>
#include <string_view>
#include <vector>

namespace headroom {

/// Returns: the Levenshtein distance between a and b (insertions, deletions and
/// substitutions, each costing 1; Levenshtein 1966). O(|a|·|b|) time.
inline std::size_t edit_distance(std::string_view a, std::string_view b) {
  std::vector<std::size_t> row(b.size() + 1);
  for (std::size_t j = 0; j <= b.size(); ++j) row[j] = j;
  for (std::size_t i = 1; i <= a.size(); ++i) {
    std::size_t diagonal = row[0];
    row[0] = i;
    for (std::size_t j = 1; j <= b.size(); ++j) {
      const std::size_t above = row[j];
      row[j] = std::min({row[j] + 1, row[j - 1] + 1, diagonal + (a[i - 1] == b[j - 1] ? 0 : 1)});
      diagonal = above;
    }
  }
  return row[b.size()];
}

/// Returns: the candidate closest to `typed` by edit_distance, or "" when none
/// is within max(2, |typed| / 3) edits (farther than that a suggestion is a
/// guess, not a correction: our own threshold). Ties go to the earlier candidate.
inline std::string nearest_name(std::string_view typed, const std::vector<std::string>& candidates) {
  const std::size_t allowed = std::max<std::size_t>(2, typed.size() / 3);
  std::string best;
  std::size_t best_distance = allowed + 1;
  for (const auto& c : candidates) {
    const std::size_t d = edit_distance(typed, c);
    if (d < best_distance) {
      best = c;
      best_distance = d;
    }
  }
  return best;
}

}  // namespace headroom
