// headroom — merging shard records (merge.h).
#include "headroom/merge.h"

#include <algorithm>
#include <charconv>
#include <map>
#include <optional>
#include <set>

#include <fmt/format.h>

#include "headroom/input_error.h"

namespace headroom {
namespace {

struct ShardId {
  int index = 0, count = 0;  // 1-based index; count 0 for "merged"
};

std::optional<ShardId> parse_shard_field(const std::string& s) {
  if (s == "merged") return ShardId{};
  const auto slash = s.find('/');
  if (slash == std::string::npos) return std::nullopt;
  ShardId id;
  const char* b = s.data();
  const char* e = b + s.size();
  auto r1 = std::from_chars(b, b + slash, id.index);
  auto r2 = std::from_chars(b + slash + 1, e, id.count);
  if (r1.ec != std::errc{} || r1.ptr != b + slash || r2.ec != std::errc{} || r2.ptr != e) return std::nullopt;
  if (id.count < 1 || id.index < 1 || id.index > id.count) return std::nullopt;
  return id;
}

// The case name of a skipped line "name: reason".
std::string skipped_name(const std::string& line) { return line.substr(0, line.find(": ")); }

void require_same(const MergeInput& first, const MergeInput& in, const std::string& field, const std::string& a,
                  const std::string& b) {
  if (a == b) return;
  throw InputError(in.file, "field \"" + field + "\"",
                   fmt::format("is \"{}\" but \"{}\" in {}: not a shard of the same run", b, a, first.file),
                   "merge only the shards of one qualify run (same kernel, formats, suite, budget and headroom)");
}

}  // namespace

bool canonical_case_order(const CaseRecord& a, const CaseRecord& b) { return a.name < b.name; }

void sort_canonically(RunRecord& r) {
  std::sort(r.cases.begin(), r.cases.end(), canonical_case_order);
  std::sort(r.skipped.begin(), r.skipped.end());
}

MergeResult merge_records(const std::vector<MergeInput>& inputs, bool allow_partial) {
  if (inputs.empty())
    throw InputError("command line", "inputs", "no record to merge", "give the JSON records of the shards");
  const MergeInput& first = inputs.front();
  MergeResult out;
  RunRecord& m = out.record;
  m.tool = first.record.tool;
  m.kernel = first.record.kernel;
  m.kernel_description = first.record.kernel_description;
  m.input_format = first.record.input_format;
  m.output_format = first.record.output_format;
  m.suite = first.record.suite;
  m.budget = first.record.budget;
  m.tolerated_faults = first.record.tolerated_faults;
  m.warnings = first.record.warnings;  // one budget, one kernel: every shard doubted the same
  m.growth_limit = first.record.growth_limit;  // the same budget: the merged cases are fitted against it
  m.growth_limit_origin = first.record.growth_limit_origin;
  m.command = "merge";
  m.shard = "merged";

  std::map<std::string, std::string> owner;  // case name → file holding it
  std::map<int, std::string> shard_owner;    // shard index → file
  int shard_count = 0;
  bool merged_input = false;  // a merged input hides which shards it holds
  std::string count_file;
  std::set<std::string> inherited_missing;  // shards a partial merged input lacks
  for (const auto& in : inputs) {
    const RunRecord& r = in.record;
    require_same(first, in, "tool", first.record.tool, r.tool);
    require_same(first, in, "kernel", first.record.kernel, r.kernel);
    require_same(first, in, "kernel_description", first.record.kernel_description, r.kernel_description);
    require_same(first, in, "input_format", first.record.input_format, r.input_format);
    require_same(first, in, "output_format", first.record.output_format, r.output_format);
    require_same(first, in, "suite", first.record.suite, r.suite);
    require_same(first, in, "budget", first.record.budget, r.budget);
    auto tolerated = [](std::vector<std::string> v) {
      std::sort(v.begin(), v.end());
      std::string s;
      for (const auto& x : v) s += (s.empty() ? "" : ",") + x;
      return s;
    };
    require_same(first, in, "tolerated_faults", tolerated(first.record.tolerated_faults), tolerated(r.tolerated_faults));

    const auto id = parse_shard_field(r.shard);
    if (!id)
      throw InputError(in.file, "field \"shard\"", "is \"" + r.shard + "\", neither \"i/n\" (1 ≤ i ≤ n) nor \"merged\"",
                       "give a record written by headroom qualify --shard i/n or by headroom merge");
    if (id->count == 0) merged_input = true;
    inherited_missing.insert(r.missing_shards.begin(), r.missing_shards.end());
    if (id->count > 0) {
      if (shard_count == 0) {
        shard_count = id->count;
        count_file = in.file;
      } else if (id->count != shard_count) {
        throw InputError(in.file, "field \"shard\"",
                         fmt::format("is {} but {} is a shard of {}: slices of different counts overlap or leave gaps",
                                     r.shard, count_file, shard_count),
                         "merge the shards of one --shard i/n split");
      }
      if (auto [it, fresh] = shard_owner.emplace(id->index, in.file); !fresh)
        throw InputError(in.file, "field \"shard\"", fmt::format("shard {} is also {}", r.shard, it->second),
                         "give each shard once");
    }
    auto claim = [&](const std::string& name, const std::string& place) {
      if (auto [it, fresh] = owner.emplace(name, in.file); !fresh)
        throw InputError(in.file, place, fmt::format("case \"{}\" is also in {}", name, it->second),
                         "give each shard once; shards of one split hold disjoint cases");
    };
    for (std::size_t i = 0; i < r.cases.size(); ++i) {
      claim(r.cases[i].name, fmt::format("cases[{}] field \"name\"", i));
      m.cases.push_back(r.cases[i]);
    }
    for (std::size_t i = 0; i < r.skipped.size(); ++i) {
      claim(skipped_name(r.skipped[i]), fmt::format("skipped[{}]", i));
      m.skipped.push_back(r.skipped[i]);
    }
  }
  std::set<std::string> missing;
  for (const auto& s : inherited_missing)
    if (auto id = parse_shard_field(s); !id || id->count != shard_count || !shard_owner.count(id->index)) missing.insert(s);
  if (shard_count > 0 && !merged_input)
    for (int i = 1; i <= shard_count; ++i)
      if (!shard_owner.count(i)) missing.insert(fmt::format("{}/{}", i, shard_count));
  if (!missing.empty()) {
    std::string list;
    for (const auto& s : missing) list += (list.empty() ? "" : ", ") + s;
    const std::string what = fmt::format("shard{} {} missing", missing.size() > 1 ? "s" : "", list);
    if (!allow_partial)
      throw InputError("command line", "RECORDS", what + ": the merged record would cover only part of the suite",
                       "give the records of every shard, or pass --allow-partial for a record whose verdict says partial");
    m.missing_shards.assign(missing.begin(), missing.end());
    out.notes.push_back(what + ": the merged record covers only part of the suite; its verdict is " + m.verdict());
  }
  sort_canonically(m);
  return out;
}

MergeResult merge_files(const std::vector<std::filesystem::path>& files, bool allow_partial) {
  std::vector<MergeInput> inputs;
  for (const auto& f : files) inputs.push_back({f.string(), read_run_record(f)});
  return merge_records(inputs, allow_partial);
}

}  // namespace headroom
