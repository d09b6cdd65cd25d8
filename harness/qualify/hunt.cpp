// headroom — property-based search and greedy shrinking (hunt.h).
#include "headroom/hunt.h"

#include <algorithm>

#include "headroom/case_folder.h"
#include "headroom/families.h"
#include "headroom/input_error.h"
#include "headroom/shape_draw.h"

namespace headroom {
namespace {

// Judges one case and applies the budget, as run_cases does.
Judgement judge_with_budget(AttachedKernel& k, const Case& c, const CaseRequest& req, const RunnerOptions& opt,
                            const std::string& replay) {
  Judgement j = judge_case(k, c, opt.judge, replay);
  j.record.size = req.size;
  if (!j.unfit && opt.apply_budget) opt.apply_budget(j.record, j, c);
  return j;
}

std::string replay_of(const CaseRequest& req, const RunnerOptions& run, const std::string& kernel_name,
                      const std::string& name) {
  return make_and_replay_command(run, kernel_name, req, "case-" + case_folder_name(name));
}

}  // namespace

std::string failure_signature(const CaseRecord& r) {
  if (r.within_budget) return "";
  // Faults in the canonical class order, so the signature does not depend on detector order.
  for (const FaultClass f : kAllFaultClasses) {
    const std::string name(fault_class_name(f));
    if (r.faults.count(name)) return "fault:" + name;
  }
  for (const char* other : {"bad_output", "unsupported"})
    if (r.faults.count(other)) return std::string("fault:") + other;
  return "budget";
}

std::vector<CaseRequest> hunt_requests(const HuntOptions& opt, Level level) {
  std::vector<std::string> names = opt.families;
  if (names.empty())
    for (const auto& f : kFamilies)
      if (f.level == level) names.emplace_back(f.name);
  for (const auto& n : names) {
    const FamilyInfo* f = find_family(n);
    if (!f) throw InputError("command line", "--family " + n, "is not a generator family", "see `headroom case families`");
    if (f->level != level)
      throw InputError("command line", "--family " + n, "makes cases of the other level than the kernel computes",
                       "choose families of the kernel's level (see `headroom case families`)");
  }
  if (opt.max_kv_len != 0 && (opt.max_kv_len < kMinHuntKvLen || opt.max_kv_len > kMaxHuntKvLen))
    throw InputError("command line", "--max-kv-len " + std::to_string(opt.max_kv_len), "is outside 16 to 131072",
                     "give a largest Tk from 16 to 131072 (e.g. 16384), or leave it out for small shapes only");
  std::vector<CaseRequest> reqs;
  if (names.empty()) return reqs;
  for (int i = 0; i < opt.cases; ++i) {
    CaseRequest r;
    r.family = names[static_cast<std::size_t>(i) % names.size()];
    r.seed = opt.seed + static_cast<std::uint64_t>(i);
    r.size = opt.cases <= 1 ? kDefaultSize : 10 + (kDefaultSize - 10) * i / (opt.cases - 1);
    r.level = level;
    if (opt.max_kv_len > 0 && level == Level::core && takes_any_shape(r.family) && draws_production_shape(r.seed))
      r.shape = draw_production_shape(r.seed, opt.max_kv_len);
    reqs.push_back(r);
  }
  return reqs;
}

HuntResult hunt(AttachedKernel& k, const HuntOptions& opt) {
  const KernelDeclaration& d = k.declaration();
  const RunnerOptions& run = opt.runner;
  HuntResult result;
  RunRecord& record = result.record;
  record.kernel = d.name;
  record.kernel_description = d.description;
  record.input_format = std::string(format_name(d.input_format));
  record.output_format = std::string(format_name(d.output_format));
  record.shard = run.shard.text();

  std::vector<CaseRequest> reqs;
  for (auto& r : hunt_requests(opt, d.level))
    if (in_shard(r.family + "/" + std::to_string(r.seed), run.shard)) reqs.push_back(std::move(r));

  std::size_t done = 0;
  for (const CaseRequest& req : reqs) {
    rc::Shrinkable<Case> current = shrinkable_case(req);
    CaseRequest current_req = req;
    Case c = current.value();
    if (run.journal) {
      if (const CaseRecord* seen = run.journal->find(c.name)) {
        record.cases.push_back(*seen);
        if (run.progress) run.progress(++done, reqs.size(), *seen);
        continue;
      }
    }
    Judgement j = judge_with_budget(k, c, req, run, replay_of(req, run, d.name, c.name));
    if (j.unfit) {
      record.skipped.push_back(c.name + ": " + *j.unfit);
      if (run.progress) run.progress(++done, reqs.size(), j.record);
      continue;
    }
    const std::string signature = failure_signature(j.record);
    if (!signature.empty()) {
      HuntFinding finding{c.name, c.name, signature, 0, {}};
      // Greedy descent through the shrink tree: take the first shrink that fails the same way.
      bool moved = true;
      while (moved && finding.shrink_steps < opt.max_shrink_steps) {
        moved = false;
        auto shrinks = current.shrinks();
        int index = 0;
        for (auto it = shrinks.next(); it && finding.shrink_steps < opt.max_shrink_steps; it = shrinks.next(), ++index) {
          ++finding.shrink_steps;
          const Case candidate = it->value();
          CaseRequest cand_req = current_req;
          cand_req.shrink_path.push_back(index);
          Judgement cj = judge_with_budget(k, candidate, cand_req, run, replay_of(cand_req, run, d.name, candidate.name));
          if (!cj.unfit && failure_signature(cj.record) == signature) {
            current = *it;
            current_req = std::move(cand_req);
            c = candidate;
            j = std::move(cj);
            moved = true;
            break;
          }
        }
      }
      finding.shrunk = c.name;
      if (!opt.save.empty()) {
        finding.saved = opt.save / case_folder_name(c.name);
        std::filesystem::create_directories(opt.save);
        write_case(c, finding.saved);
        j.record.replay = replay_command(run, d.name, finding.saved.string());
      }
      result.findings.push_back(finding);
    }
    if (run.journal) run.journal->append(j.record);
    record.cases.push_back(j.record);
    if (run.progress) run.progress(++done, reqs.size(), record.cases.back());
  }
  std::sort(record.cases.begin(), record.cases.end(), [](const CaseRecord& a, const CaseRecord& b) { return a.name < b.name; });
  return result;
}

}  // namespace headroom
