// headroom — the result record of a run: one entry per case, versioned JSON.
//
// This is what `qualify`, `hunt` and `replay` write, what `merge` joins and
// `compare` diffs, and what every report is drawn from. The schema is
// documented in docs/result-schema.md; `schema` is bumped on any change that an
// older reader would misread. Timings are kept out of the per-case records so a
// resumed or sharded run yields a record equal to an uninterrupted one.
#pragma once

#include <array>
#include <cstdint>
#include <filesystem>
#include <limits>
#include <map>
#include <optional>
#include <string>
#include <vector>

#include <nlohmann/json.hpp>

#include "headroom/input_file.h"

namespace headroom {

inline constexpr int kRecordSchema = 1;

/// The error figures of one case (NaN where not applicable, e.g. no lse).
struct CaseFigures {
  std::int64_t elements = 0;        ///< output elements scored (fully masked rows excluded)
  double max_ulp = 0;               ///< in the output format
  double max_scaled_error = 0;      ///< |o − o*| / (u_F · Σ p_j |v_j|)
  double max_abs_error = 0;
  double rmse = 0;
  double relative_rmse = 0;         ///< RMSE / RMS(o*)
  double relative_l1 = 0;           ///< Σ|o − o*| / Σ|o*|
  double cosine = 1;                ///< cosine similarity of o and o*
  double lse_error = 0;             ///< max |lse − lse*|, NaN when the kernel returns none
  double ratio_to_plain = 0;        ///< max scaled error / that of the textbook kernel of the format; NaN if n/a
  double input_error = 0;           ///< max scaled error of reference(received) vs reference(source)
  double p_rounding_error = std::numeric_limits<double>::quiet_NaN();  ///< max scaled error of P rounded as the
                                    ///< kernel declares (p_quant) vs reference(received); NaN when P is not rounded
  double kernel_error = 0;          ///< max scaled error of kernel vs reference(received)  (= max_scaled_error)
  std::string worst_index;          ///< "b,h,i,d" of the worst scaled error
  double worst_expected = 0;        ///< o* there
  double worst_obtained = 0;        ///< o there
  double worst_ulp_at = std::numeric_limits<double>::quiet_NaN();  ///< ULP distance there (not max_ulp, which
                                                                   ///< may be another element's); NaN when not recorded
};

/// One gradient tensor judged one way (docs/backward.md): the forward's
/// figures, in the units of CaseFigures with each element's natural magnitude
/// (reference_backward.h) in place of Σ p_j|v_j|.
struct GradientFigures {
  double max_ulp = 0;
  double max_scaled_error = 0;
  double rmse = 0;
  double relative_rmse = 0;
  double cosine = 1;
  double ratio_to_plain = std::numeric_limits<double>::quiet_NaN();  ///< max scaled error / that of the plain
                                                                     ///< same-precision backward; NaN if n/a
};

/// The gradient tensors, in the order of GradientFigures arrays; d_bias
/// (= dS) only where BackwardFigures::bias_judged.
inline constexpr const char* kGradientNames[4] = {"d_q", "d_k", "d_v", "d_bias"};

/// A backward kernel's gradients on one case, judged two ways: fed the exact
/// O and log-sum-exp (the backward's own error) and fed the kernel's own
/// forward outputs (end to end, as training sees it).
struct BackwardFigures {
  std::array<GradientFigures, 4> fed_exact{};   ///< d_q, d_k, d_v, d_bias
  std::array<GradientFigures, 4> end_to_end{};  ///< d_q, d_k, d_v, d_bias
  bool end_to_end_judged = true;  ///< false when the kernel's forward gave no lse to feed it
  /// d(bias) judged: the kernel declares HR_BACKWARD_BIAS_GRAD and the mask is
  /// a bias; otherwise the arrays' last entries are unused.
  bool bias_judged = false;
  /// Returns: how many tensors of each array were judged: 4 with d(bias), else 3.
  std::size_t tensors() const { return bias_judged ? 4 : 3; }
  std::string upstream;           ///< where dO came from: "case" (d_o.npy) or the generated kind
  double spread = 0;              ///< a kernel declaring nondeterminism: largest scaled spread of two calls
  /// Returns: the largest max_scaled_error over the tensors of both ways.
  double worst_scaled_error() const;
  /// Returns: the largest ratio_to_plain over the tensors of both ways (NaN when none).
  double worst_ratio_to_plain() const;
};

/// The limits a case was judged against (budget.h), resolved at the case's
/// shape: +inf where the budget sets none, NaN where the record does not say
/// (a record written before limits were recorded, or a case never judged).
struct CaseLimits {
  double max_ulp = std::numeric_limits<double>::quiet_NaN();
  double max_scaled_error = std::numeric_limits<double>::quiet_NaN();  ///< in output rounding units
  double max_rel_rmse = std::numeric_limits<double>::quiet_NaN();      ///< RMSE / RMS(o*)
  double max_ratio_to_plain = std::numeric_limits<double>::quiet_NaN();
  // Backward judged (optional on read, absent when not): the gradient limits,
  // fed the exact O/lse and end to end (budget.h gradient_scaled_error_limit).
  double max_gradient_scaled_error = std::numeric_limits<double>::quiet_NaN();
  double max_gradient_scaled_error_end_to_end = std::numeric_limits<double>::quiet_NaN();
  double max_gradient_ratio_to_plain = std::numeric_limits<double>::quiet_NaN();
};

struct CaseRecord {
  std::string name;         ///< unique within a run; deterministic
  std::string family;
  std::uint64_t seed = 0;
  int size = 0;
  std::string level;        ///< "core" | "block"
  std::string shape;        ///< "B,Hq,Hkv,Tq,Tk,Dk,Dv" (block: "B,Tq,Tk,Dm,Hq,Hkv,Dk,Dv")
  std::int64_t kv_len = 0;  ///< for plots against sequence length
  double logit_scale = 0;   ///< max |z| over visible scores, for plots against logit scale
  std::string mask;         ///< mask kind name
  std::string format;       ///< kernel input format name
  CaseFigures figures;
  std::map<std::string, int> faults;      ///< class name → count (absent = 0)
  std::vector<std::string> fault_details; ///< one line each
  bool within_budget = true;
  std::vector<std::string> reasons;       ///< why not within budget
  std::string replay;                     ///< the one command that reproduces this case
  std::vector<double> ulp_histogram;      ///< elements per bucket of ulp_histogram_edges() (scores.h)
  CaseLimits limits;                      ///< JSON "limits"; optional on read (absent: all NaN)
  bool reference_certified = true;        ///< every reference bound met its target; optional on read (absent: true)
  std::optional<BackwardFigures> backward; ///< JSON "backward": the gradients, when the kernel's backward
                                           ///< was judged on this case; optional on read (absent: not judged)
};

/// How many of a level's cases a kernel took: `of` = the cases of that level
/// the run held (run, declined as unsupported, or skipped as unfit); `taken` =
/// those it ran without declining.
struct LevelTake {
  std::string level;  ///< "core" | "block"
  std::size_t taken = 0, of = 0;
  /// Returns: true when the kernel declined or could not take most of them
  /// (taken < of / 2): a pass there is thin evidence and says so.
  bool thin() const { return 2 * taken < of; }
};

struct RunRecord {
  int schema = kRecordSchema;
  std::string tool = "headroom 0.1.0";
  std::string command;        ///< qualify | hunt | replay | merge
  std::string kernel;
  std::string kernel_description;
  std::string input_format, output_format;
  std::string suite;          ///< suite name, or "hunt", or "replay"
  std::string budget;         ///< budget file path or "defaults"
  std::string shard = "1/1";  ///< "i/n" (1-based); merged records say "merged"
  std::vector<CaseRecord> cases;
  std::vector<std::string> skipped;  ///< "name: reason" for cases that do not fit the kernel's declaration
  std::vector<std::string> tolerated_faults;  ///< fault classes the budget tolerates; optional on read (absent: none)
  std::vector<std::string> warnings;  ///< what the run doubted in its input (a budget section naming no kernel of
                                      ///< the run); optional on read (absent: none)
  /// The budget's max_growth_exponent: the largest error growth exponent
  /// (error_growth.h) a format may show; NaN: none. Optional on read (absent: none).
  double growth_limit = std::numeric_limits<double>::quiet_NaN();
  std::string growth_limit_origin;  ///< where it was set, e.g. "budget.toml line 4"
  /// Shards ("i/n") a merge was allowed to go without (merge --allow-partial);
  /// JSON "missing_shards", written only when not empty.
  std::vector<std::string> missing_shards;

  /// Returns: "pass" when every case is within budget and no format's error
  /// growth exponent is above growth_limit (growth_failures()), else "fail";
  /// prefixed "partial_" when shards are missing.
  std::string verdict() const;
  /// Returns: per level with at least one case run (declined included), in
  /// the order core, block, how many of its cases the kernel took. A skipped
  /// case's level is its family's (families.h, by the case name's prefix).
  std::vector<LevelTake> level_takes() const;
  /// Returns: verdict(), followed for each thin level by how much the
  /// kernel took, e.g. "pass on 2 of 21 block cases" (every report face and
  /// the JSON "verdict_line" show this, so thin coverage is never a plain pass).
  std::string verdict_line() const;
  /// Returns: error_growth.h growth_failures() of the cases against growth_limit.
  std::vector<std::string> growth_failures() const;
  /// Returns: fault counts summed over all cases, by class name.
  std::map<std::string, int> fault_totals() const;
};

/// Returns: x as JSON, with NaN and ±infinity (which JSON lacks) as the strings
/// "nan", "inf", "-inf" — the convention of every headroom JSON file.
nlohmann::json json_number(double x);

nlohmann::json to_json(const CaseRecord& c);
nlohmann::json to_json(const RunRecord& r);
/// Returns: the case record in `j`. Throws InputError(file, place, ...) on any
/// missing field, wrong type, value out of range (a negative error or limit, a
/// count past int), unknown enum value (level, mask, format, fault class), an
/// invalid case name (case_folder.h's rules), a shape that is not 7 (core) or
/// 8 (block) positive extents, or a kv_len that is not its Tk.
/// run_record_from_json also refuses: an unknown command, a shard that is not
/// "i/n" (1 ≤ i ≤ n ≤ 100000) or "merged" (for command merge only), a case
/// named twice (run or skipped), and a
/// verdict or fault totals that are not what the cases give.
CaseRecord case_record_from_json(const nlohmann::json& j, const std::string& file, const std::string& place);
RunRecord run_record_from_json(const nlohmann::json& j, const std::string& file);

/// A run record or journal as an input file (input_file.h). A case record is
/// about 2 KB of JSON, so the cap allows some 100 000 cases; it only guards
/// against a wrong, huge file.
inline constexpr InputKind kRecordFile{"JSON record", std::uint64_t{256} << 20,
                                       "give a record written by headroom --json"};

/// Returns: the record in a JSON file. Throws InputError naming the file, the
/// line and column of a syntax error, or the field of a schema error.
RunRecord read_run_record(const std::filesystem::path& path);
/// Writes the record atomically (temporary file in the same folder, then rename).
/// Throws InputError when the folder is not writable or the disk is full; the
/// previous file is then left intact.
void write_run_record(const RunRecord& r, const std::filesystem::path& path);

}  // namespace headroom
