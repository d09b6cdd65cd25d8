// headroom — joining the records of shards (`--shard i/n`) into the record of the whole run.
//
// The shards must be of one run: the same kernel (name and description),
// input and output formats, suite, budget, tolerated faults and headroom
// version, with disjoint case names (run or skipped). A shard given twice, a
// case in two files or any mismatch is refused with an InputError naming the
// file and the field. The merged record holds every case sorted by name (the
// canonical order qualify writes too, docs/result-schema.md), the skipped
// lines sorted, shard "merged" and command "merge"; so merging the shards of
// a suite gives the unsharded record but for those two fields.
#pragma once

#include <filesystem>
#include <string>
#include <vector>

#include "headroom/record.h"

namespace headroom {

/// Returns: whether a sorts before b in the canonical case order (by name, byte-wise).
bool canonical_case_order(const CaseRecord& a, const CaseRecord& b);
/// Sorts r.cases into the canonical order, and r.skipped by text.
void sort_canonically(RunRecord& r);

struct MergeInput {
  std::string file;  ///< for messages
  RunRecord record;
};

struct MergeResult {
  RunRecord record;
  /// Remarks that do not stop the merge, e.g. "shards 3/4 missing: the merged
  /// record covers part of the suite".
  std::vector<std::string> notes;
};

/// Returns: the merged record. Throws InputError(file, field, ...) naming the
/// offending input: no input at all, a shard field that is neither "i/n" nor
/// "merged", shards of different counts, the same shard twice, a mismatch in
/// any field listed above, or a case name already in another input. A shard
/// of the split missing (or missing from a partial merged input) is an
/// InputError too, unless `allow_partial`: then the record lists them in
/// missing_shards, its verdict is "partial_pass" or "partial_fail", and a note says so.
MergeResult merge_records(const std::vector<MergeInput>& inputs, bool allow_partial = false);

/// Returns: merge_records of the records read from `files` (read_run_record:
/// InputError for a malformed or schema-mismatched file).
MergeResult merge_files(const std::vector<std::filesystem::path>& files, bool allow_partial = false);

}  // namespace headroom
