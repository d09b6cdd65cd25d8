// headroom — the case loop behind qualify, hunt and replay (qualify.h).
#include <algorithm>
#include <cctype>
#include <cstdlib>
#include <optional>
#include <utility>

#include "headroom/case_folder.h"
#include "headroom/input_error.h"
#include "headroom/judge_backward.h"
#include "headroom/qualify.h"

namespace headroom {
namespace {

// FNV-1a, 64-bit: stable across platforms and releases, unlike std::hash.
std::uint64_t stable_hash(const std::string& s) {
  std::uint64_t h = 1469598103934665603ull;
  for (unsigned char ch : s) {
    h ^= ch;
    h *= 1099511628211ull;
  }
  return h;
}

}  // namespace

std::string shell_quote(const std::string& s) {
  if (!s.empty() && s.find_first_of(" \t\n'\"$\\;&|<>()*?[]{}~`#!=") == std::string::npos) return s;
  std::string out = "'";
  for (char ch : s) out += ch == '\'' ? std::string("'\\''") : std::string(1, ch);
  return out + "'";
}

std::string replay_command(const RunnerOptions& opt, const std::string& kernel_name, const std::string& folder) {
  const std::string spec = opt.kernel_spec.empty() ? kernel_name : opt.kernel_spec;
  return shell_quote(opt.tool) + " replay " + (opt.kernel_is_program ? "--kernel-cmd " : "--kernel ") +
         shell_quote(spec) + opt.judging_options + " " + shell_quote(folder);
}

std::string make_and_replay_command(const RunnerOptions& opt, const std::string& kernel_name,
                                    const CaseRequest& request, const std::string& dir) {
  return case_command(request, dir, shell_quote(opt.tool)) + " && " + replay_command(opt, kernel_name, dir);
}

std::string case_folder_name(const std::string& name) {
  std::string out = name;
  for (char& ch : out)
    if (!(std::isalnum(static_cast<unsigned char>(ch)) || ch == '.' || ch == '_' || ch == '-')) ch = '_';
  // "." and ".." (and names made only of dots) would name the folder itself or its parent.
  if (out.find_first_not_of('.') == std::string::npos) out = "case" + out;
  return out;
}

std::string Shard::text() const { return std::to_string(index + 1) + "/" + std::to_string(count); }

Shard parse_shard(const std::string& text) {
  const auto slash = text.find('/');
  auto bad = [&] {
    return InputError("command line", "--shard " + quote_input(text, 40), "is not i/n with 1 ≤ i ≤ n ≤ 100000",
                      "write e.g. --shard 2/3 for the second of three shards");
  };
  if (slash == std::string::npos) throw bad();
  char* end = nullptr;
  const long i = std::strtol(text.c_str(), &end, 10);
  if (end != text.c_str() + slash) throw bad();
  const long n = std::strtol(text.c_str() + slash + 1, &end, 10);
  if (*end != '\0' || n < 1 || i < 1 || i > n || n > kMaxShards) throw bad();
  return {static_cast<int>(i - 1), static_cast<int>(n)};
}

bool in_shard(const std::string& name, const Shard& s) {
  return s.count <= 1 || stable_hash(name) % static_cast<std::uint64_t>(s.count) == static_cast<std::uint64_t>(s.index);
}

std::function<void(CaseRecord&, const Judgement&, const Case&)> budget_applier(KernelBudget budget) {
  return [budget = std::move(budget)](CaseRecord& rec, const Judgement& j, const Case& c) {
    Verdict v = judge(j.score ? &*j.score : nullptr, j.faults, budget, accumulation_length(c),
                      j.ratio ? &*j.ratio : nullptr);
    if (j.score && c.level == Level::core) {
      for (VerdictReason& r : judge_gradients(rec, *j.score, budget, c.core.shape)) v.reasons.push_back(std::move(r));
      v.pass = v.reasons.empty();
    }
    rec.within_budget = v.pass;
    if (j.score) {
      // The limits at this case's shape; the scaled-error one at the row holding the worst error.
      const CaseScore& s = *j.score;
      const std::int64_t n = accumulation_length(c);
      const auto worst = std::max_element(s.row_max_scaled.begin(), s.row_max_scaled.end());
      rec.limits.max_scaled_error =
          worst == s.row_max_scaled.end()
              ? budget.scaled_error_limit(n, s.format)
              : budget.row_scaled_error_limit(n, s, static_cast<std::size_t>(worst - s.row_max_scaled.begin()));
      rec.limits.max_rel_rmse = budget.rel_rmse_limit(n, s);
      rec.limits.max_ulp = budget.max_ulp.relative_at(n, s.unit_roundoff);
      rec.limits.max_ratio_to_plain = budget.max_ratio_to_plain.relative_at(n, s.unit_roundoff);
    }
    rec.reasons.clear();
    for (const auto& r : v.reasons) rec.reasons.push_back(r.text);
    for (const auto& n : v.notes) rec.fault_details.push_back("note: " + n);
  };
}

PlannedCase planned(const CaseRequest& r) {
  PlannedCase p;
  p.request = r;
  p.name = case_outline(r).name;
  return p;
}

PlannedCase planned(const std::filesystem::path& dir, const std::string& name) {
  PlannedCase p;
  p.folder = dir;
  p.name = name.empty() ? read_case(dir).name : name;
  return p;
}

RunRecord run_cases(AttachedKernel& k, const std::vector<PlannedCase>& cases, const RunnerOptions& opt,
                    std::vector<std::string>* skipped) {
  const KernelDeclaration& d = k.declaration();
  RunRecord record;
  record.kernel = d.name;
  record.kernel_description = d.description;
  record.input_format = std::string(format_name(d.input_format));
  record.output_format = std::string(format_name(d.output_format));
  record.shard = opt.shard.text();

  std::vector<const PlannedCase*> mine;
  for (const auto& p : cases)
    if (in_shard(p.case_name(), opt.shard)) mine.push_back(&p);
  std::sort(mine.begin(), mine.end(),
            [](const PlannedCase* a, const PlannedCase* b) { return a->case_name() < b->case_name(); });

  std::size_t done = 0;
  for (const PlannedCase* p : mine) {
    if (opt.journal) {
      if (const CaseRecord* seen = opt.journal->find(p->case_name())) {
        record.cases.push_back(*seen);
        if (opt.progress) opt.progress(++done, mine.size(), *seen);
        continue;
      }
    }
    // A planned case is made or read now, and freed when the next one is.
    // A made or read case is handed to judge_case, which may take its input
    // tensors (held once); saving a failure makes or reads it again.
    const auto make = [p] {
      std::optional<Case> c;
      if (p->c.name.empty() && p->request) c = make_case(*p->request);
      if (p->c.name.empty() && !p->request && !p->folder.empty()) {
        c = read_case(p->folder);
        c->name = p->name;  // a corpus's duplicate names were made unique when planned
      }
      return c;
    };
    std::optional<Case> made = make();
    const Case& c = made ? *made : p->c;
    const std::string replay = p->request
                                   ? make_and_replay_command(opt, d.name, *p->request, "case-" + case_folder_name(c.name))
                                   : replay_command(opt, d.name, p->folder.string());
    Judgement j = made ? judge_case(k, std::move(*made), opt.judge, replay) : judge_case(k, c, opt.judge, replay);
    if (p->request) j.record.size = p->request->size;
    if (j.unfit) {
      const std::string line = c.name + ": " + *j.unfit;
      record.skipped.push_back(line);
      if (skipped) skipped->push_back(line);
      if (opt.progress) opt.progress(++done, mine.size(), j.record);
      continue;
    }
    if (opt.apply_budget) opt.apply_budget(j.record, j, c);
    if (!j.record.within_budget && !opt.save_failures.empty()) {
      const auto folder = opt.save_failures / case_folder_name(c.name);
      std::filesystem::create_directories(opt.save_failures);
      if (made) made = make();  // its tensors went to judge_case
      write_case(c, folder);
      j.record.replay = replay_command(opt, d.name, folder.string());
    }
    if (opt.journal) opt.journal->append(j.record);
    record.cases.push_back(j.record);
    if (opt.progress) opt.progress(++done, mine.size(), record.cases.back());
  }
  return record;
}

}  // namespace headroom
