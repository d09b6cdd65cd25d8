// Tests of the report stage: summaries and coverage, terminal summary and
// progress bar, Markdown, JUnit XML, compare and merge (all from hand-built records).
#include <fcntl.h>
#include <gtest/gtest.h>
#include <poll.h>
#include <unistd.h>

#include <cmath>
#include <cstdio>
#include <cstdlib>
#include <filesystem>
#include <fstream>
#include <sstream>

#include "headroom/compare.h"
#include "headroom/families.h"
#include "headroom/html_report.h"
#include "headroom/input_error.h"
#include "headroom/junit_report.h"
#include "headroom/markdown_report.h"
#include "headroom/merge.h"
#include "headroom/progress_bar.h"
#include "headroom/reports.h"
#include "headroom/run_summary.h"
#include "headroom/terminal_report.h"
#include "report_records.h"

namespace headroom {
namespace {

namespace fs = std::filesystem;
using testing::make_case;
using testing::make_record;

fs::path fresh_dir(const std::string& name) {
  fs::path d = fs::temp_directory_path() / ("headroom_report_test_" + name + "_" + std::to_string(::getpid()));
  fs::remove_all(d);
  fs::create_directories(d);
  return d;
}

std::string read_file(const fs::path& p) {
  std::ifstream in(p, std::ios::binary);
  std::stringstream s;
  s << in.rdbuf();
  return s.str();
}

// Seven cases of two families; scaled errors 1..7 in a scrambled order so that
// "the five worst in order" cannot come from record order.
RunRecord seven_cases() {
  RunRecord r = make_record({make_case("g-3", "gaussian", 3, 2), make_case("g-7", "gaussian", 7, 9),
                             make_case("m-1", "masks", 1, 1), make_case("g-5", "gaussian", 5, 4),
                             make_case("m-6", "masks", 6, 3), make_case("g-2", "gaussian", 2, 1),
                             make_case("m-4", "masks", 4, 2)});
  r.cases[1].within_budget = false;  // g-7
  r.cases[1].reasons = {"max_scaled_error 7 > 6 (default for float32)"};
  return r;
}

std::string section(const std::string& text, const std::string& heading) {
  const auto start = text.find(heading);
  if (start == std::string::npos) return "";
  const auto end = text.find("\n## ", start + heading.size());
  return text.substr(start, end == std::string::npos ? std::string::npos : end - start);
}

// ----- summaries ---------------------------------------------------------------

TEST(RunSummary, GroupsTakeTheWorstOfTheirCasesAndIgnoreNaN) {
  RunRecord r = seven_cases();
  r.cases[0].figures.ratio_to_plain = std::nan("");
  r.cases[0].faults["mask_leak"] = 2;
  const auto groups = summarise_groups(r);
  ASSERT_EQ(groups.size(), 2u);
  EXPECT_EQ(groups[0].family, "gaussian");  // families() order: gaussian before masks
  EXPECT_EQ(groups[0].cases, 4u);
  EXPECT_EQ(groups[0].worst_scaled_error, 7);
  EXPECT_EQ(groups[0].worst_scaled_case, "g-7");
  EXPECT_EQ(groups[0].worst_ulp, 9);
  EXPECT_EQ(groups[0].failing, 1u);
  EXPECT_EQ(groups[0].worst_ratio_to_plain, 1.5);  // the NaN of g-3 left out
  EXPECT_EQ(groups[0].faults.at("mask_leak"), 2);
  EXPECT_EQ(groups[1].worst_scaled_error, 6);
  EXPECT_EQ(limit_range_text(groups[0].scaled_limit), "8");
  EXPECT_EQ(limit_range_text(groups[0].ulp_limit), "none");
  r.cases[0].figures.ratio_to_plain = std::nan("");
  for (auto& c : r.cases) c.figures.ratio_to_plain = std::nan("");
  EXPECT_TRUE(std::isnan(summarise_run(r).worst_ratio_to_plain));  // no applicable figure: NaN, not 0
}

TEST(RunSummary, MarginIsTheSmallestLimitOverFigureOfAnyCase) {
  RunRecord r = seven_cases();
  const auto groups = summarise_groups(r);
  EXPECT_DOUBLE_EQ(groups[0].margin, 8.0 / 7.0);
  EXPECT_EQ(groups[0].margin_figure, "max_scaled_error");
  EXPECT_EQ(groups[0].margin_case, "g-7");
  r.cases[1].limits.max_ratio_to_plain = 1.2;  // 1.2 / 1.5: the ratio binds now, and fails
  const CaseMargin m = case_margin(r.cases[1]);
  EXPECT_DOUBLE_EQ(m.value, 0.8);
  EXPECT_EQ(m.figure, "max_ratio_to_plain");
  r.cases[1].limits = CaseLimits{};  // nothing recorded: no margin
  EXPECT_TRUE(std::isnan(case_margin(r.cases[1]).value));
}

TEST(RunSummary, WorstCasesAreOrderedByScaledErrorThenUlpThenName) {
  RunRecord r = seven_cases();
  r.cases.push_back(make_case("a-tie", "gaussian", 5, 4));  // ties g-5 on both figures: name decides
  r.cases.push_back(make_case("z-nan", "gaussian", std::nan(""), 100));
  const auto worst = worst_cases(r, 5);
  ASSERT_EQ(worst.size(), 5u);
  EXPECT_EQ(worst[0]->name, "g-7");
  EXPECT_EQ(worst[1]->name, "m-6");
  EXPECT_EQ(worst[2]->name, "a-tie");
  EXPECT_EQ(worst[3]->name, "g-5");
  EXPECT_EQ(worst[4]->name, "m-4");
  EXPECT_EQ(worst_cases(r, 100).back()->name, "z-nan");  // NaN is no figure, not a large one
}

TEST(RunSummary, ParsesCoreAndBlockShapesAndRefusesMalformedOnes) {
  const auto core = parse_shape("core", "2,8,2,5,7,64,32");
  ASSERT_TRUE(core);
  EXPECT_EQ(core->q_heads, 8);
  EXPECT_EQ(core->kv_heads, 2);
  EXPECT_EQ(core->kv_len, 7);
  EXPECT_EQ(core->value_dim, 32);
  const auto block = parse_shape("block", "1,4,6,512,8,8,64,64");
  ASSERT_TRUE(block);
  EXPECT_EQ(block->model_dim, 512);
  EXPECT_EQ(block->kv_len, 6);
  EXPECT_EQ(block->q_heads, 8);
  EXPECT_FALSE(parse_shape("core", "1,2,3"));
  EXPECT_FALSE(parse_shape("core", "1,2,2,8,16,16,"));
  EXPECT_FALSE(parse_shape("core", "1,2,2,8,0,16,16"));
  EXPECT_FALSE(parse_shape("core", "1,2,2,8,x,16,16"));
  EXPECT_FALSE(parse_shape("block", "2,8,2,5,7,64,32"));
}

TEST(Coverage, ListsWhatWasNotTriedAndCautionsWhereTheVerdictCouldMislead) {
  RunRecord r = seven_cases();
  const Coverage cov = coverage(r);
  EXPECT_EQ(cov.families.at("gaussian"), 4u);
  EXPECT_EQ(cov.families_not_tried.size(), families().size() - 2);
  EXPECT_NE(std::find(cov.families_not_tried.begin(), cov.families_not_tried.end(), "large_logits"),
            cov.families_not_tried.end());
  EXPECT_EQ(cov.masks_not_tried.size(), 5u);  // only "none"
  EXPECT_EQ(cov.formats_not_tried.size(), 6u);  // of seven: float64, binary16, bfloat16, int8, e4m3, e5m2
  auto has = [&](const std::string& words) {
    for (const auto& c : cov.cautions)
      if (c.find(words) != std::string::npos) return true;
    return false;
  };
  EXPECT_TRUE(has("No masked case was tried"));
  EXPECT_TRUE(has("No block-level case"));
  EXPECT_TRUE(has("No long sequence"));
  EXPECT_TRUE(has("No grouped-query"));
  EXPECT_TRUE(has("float32 exp overflow"));
  EXPECT_TRUE(has("multiple of 8"));

  // Now try what was missing: the cautions go away one by one.
  CaseRecord masked = make_case("c", "ragged", 1, 1, true, 2048, 200);
  masked.mask = "causal_bottom_right";
  masked.shape = "1,8,2,3,2048,20,20";
  CaseRecord block = make_case("b", "block_gaussian", 1, 1);
  block.level = "block";
  block.shape = "1,8,8,64,4,4,16,16";
  r.cases.push_back(masked);
  r.cases.push_back(block);
  const Coverage more = coverage(r);
  for (const auto& c : more.cautions) {
    EXPECT_EQ(c.find("No masked case"), std::string::npos) << c;
    EXPECT_EQ(c.find("No block-level"), std::string::npos) << c;
    EXPECT_EQ(c.find("No long sequence"), std::string::npos) << c;
    EXPECT_EQ(c.find("No grouped-query"), std::string::npos) << c;
    EXPECT_EQ(c.find("No causal case with Tq"), std::string::npos) << c;
    EXPECT_EQ(c.find("exp overflow"), std::string::npos) << c;
  }
  EXPECT_EQ(more.grouped_query, 1u);
  EXPECT_EQ(more.ragged_causal, 1u);
  EXPECT_EQ(more.kv_len.high, 2048);
  EXPECT_EQ(more.model_dim.high, 64);
}

// ----- terminal ------------------------------------------------------------------

TEST(Terminal, ColourOnlyOnATerminalAndNeverWithNoColor) {
  // https://no-color.org: NO_COLOR present and not empty disables colour.
  EXPECT_TRUE(colour_wanted(true, nullptr));
  EXPECT_TRUE(colour_wanted(true, ""));
  EXPECT_FALSE(colour_wanted(true, "1"));
  EXPECT_FALSE(colour_wanted(false, nullptr));
  const RunRecord r = seven_cases();
  EXPECT_EQ(terminal_summary(r, false).find('\x1b'), std::string::npos);
  EXPECT_NE(terminal_summary(r, true).find("\x1b[31m"), std::string::npos);
}

// Reads what the slave end of a pseudo-terminal received.
std::string drain(int master) {
  std::string out;
  char buf[4096];
  pollfd p{master, POLLIN, 0};
  while (::poll(&p, 1, 200) > 0) {
    const ssize_t n = ::read(master, buf, sizeof buf);
    if (n <= 0) break;
    out.append(buf, static_cast<std::size_t>(n));
  }
  return out;
}

TEST(Terminal, PrintSummaryColoursATerminalUnlessNoColorAndNeverAFile) {
  const RunRecord r = seven_cases();
  // A file: never coloured, NO_COLOR or not.
  ::unsetenv("NO_COLOR");
  std::FILE* file = std::tmpfile();
  ASSERT_NE(file, nullptr);
  print_summary(file, r);
  std::rewind(file);
  std::string text(4096, '\0');
  text.resize(std::fread(text.data(), 1, text.size(), file));
  std::fclose(file);
  EXPECT_EQ(text.find('\x1b'), std::string::npos);
  EXPECT_NE(text.find("FAIL kernel=f32_tiled"), std::string::npos);

  // A pseudo-terminal: coloured, except with NO_COLOR set.
  const int master = ::posix_openpt(O_RDWR | O_NOCTTY);
  ASSERT_GE(master, 0);
  ASSERT_EQ(::grantpt(master), 0);
  ASSERT_EQ(::unlockpt(master), 0);
  const int slave = ::open(::ptsname(master), O_RDWR | O_NOCTTY);
  ASSERT_GE(slave, 0);
  std::FILE* tty = ::fdopen(slave, "w");
  ASSERT_NE(tty, nullptr);
  print_summary(tty, r);
  EXPECT_NE(drain(master).find("\x1b["), std::string::npos);
  ::setenv("NO_COLOR", "1", 1);
  print_summary(tty, r);
  const std::string plain = drain(master);
  ::unsetenv("NO_COLOR");
  EXPECT_NE(plain.find("worst scaled error"), std::string::npos);
  EXPECT_EQ(plain.find('\x1b'), std::string::npos);
  std::fclose(tty);
  ::close(master);
}

TEST(Terminal, FailureLineIsOneGreppableLineWithExactHexFloatsAndTheReplay) {
  RunRecord r = seven_cases();
  // The ULP figure printed is that of the element printed (2), not the case's largest (9).
  r.cases[1].figures.worst_ulp_at = 2;
  const std::string line = failure_line(r, r.cases[1]);
  EXPECT_EQ(line,
            "FAIL kernel=f32_tiled family=gaussian seed=1003 case=g-7 at=[0,1,3,5] expected=0.1875 (0x1.8p-3) "
            "obtained=0.187500015 (0x1.800002p-3) ulp=2 scaled=7 "
            "replay: headroom replay --kernel f32_tiled --family gaussian --seed 1003 --case g-7");
  const std::string summary = terminal_summary(r, false);
  EXPECT_NE(summary.find(line + "\n"), std::string::npos);
  EXPECT_NE(summary.find("max_scaled_error 7 > 6"), std::string::npos);  // the reason, indented below
  // Exactly one FAIL line: one failing case.
  EXPECT_EQ(summary.find("FAIL kernel="), summary.rfind("FAIL kernel="));
}

TEST(Terminal, FailureLineOfAFaultWithNoOutputCarriesNoElementFigures) {
  RunRecord r = seven_cases();
  CaseRecord& c = r.cases[1];
  c.figures = CaseFigures{};
  c.faults["timeout"] = 1;
  const std::string line = failure_line(r, c);
  EXPECT_NE(line.find(" fault=timeout replay: "), std::string::npos) << line;
  EXPECT_EQ(line.find("expected="), std::string::npos) << line;
  EXPECT_EQ(line.find("ulp="), std::string::npos) << line;
}

TEST(Terminal, FailureLineOfAFaultAloneLeavesTheElementFiguresOut) {
  RunRecord r = seven_cases();
  CaseRecord& c = r.cases[1];
  c.faults["mask_leak"] = 1;
  c.reasons = {"fault mask_leak (not tolerated; default for float32): masked key j=0 changes row"};
  const std::string line = failure_line(r, c);
  EXPECT_NE(line.find(" fault=mask_leak replay: "), std::string::npos) << line;
  EXPECT_EQ(line.find("expected="), std::string::npos) << line;
}

// A case failing on its log-sum-exp alone (or on a gradient limit alone) names
// that figure, not the output's worst element, which may be within budget.
TEST(Terminal, FailureLineOfALogSumExpOrGradientLimitAloneLeavesTheOutputElementOut) {
  RunRecord r = seven_cases();
  CaseRecord& c = r.cases[1];
  c.figures.lse_error = 0.0009765625;
  c.reasons = {"max_ratio_to_plain 2423 exceeds 4 (605.8x the limit); limit 4 (log-sum-exp error against the plain "
               "kernel's), default for float32"};
  std::string line = failure_line(r, c);
  EXPECT_EQ(line.find("expected="), std::string::npos) << line;
  EXPECT_NE(line.find(" lse_error=0.0009766 replay: "), std::string::npos) << line;
  c.reasons = {"max_gradient_scaled_error 5e+06 exceeds 1e+05 (50x the limit); d_k fed the exact O and log-sum-exp"};
  line = failure_line(r, c);
  EXPECT_EQ(line.find("expected="), std::string::npos) << line;
  EXPECT_EQ(line.find("lse_error="), std::string::npos) << line;
  // With an output figure failing too, the element is printed as before.
  c.reasons.push_back("max_scaled_error 7 > 6");
  EXPECT_NE(failure_line(r, c).find(" at=[0,1,3,5] expected="), std::string::npos);
}

TEST(Terminal, WorstFigureIsPrintedOnAPassToo) {
  RunRecord r = seven_cases();
  for (auto& c : r.cases) c.within_budget = true;
  const std::string s = terminal_summary(r, false);
  EXPECT_EQ(s.find("FAIL"), std::string::npos);
  EXPECT_NE(s.find(": pass\n"), std::string::npos);
  // Only figures a limit applies to (no case has a ULP limit).
  EXPECT_NE(s.find("  worst scaled error 7 (case g-7); worst relative rmse 2.086e-07\n"), std::string::npos) << s;
  r.cases[0].limits.max_ulp = 12;
  EXPECT_NE(terminal_summary(r, false).find("worst ulp 9 (case g-7); worst scaled error 7 (case g-7)"), std::string::npos);
  EXPECT_NE(s.find("total"), std::string::npos);
}

TEST(Progress, EstimateIsMeanTimePerCaseTimesCasesLeft) {
  EXPECT_DOUBLE_EQ(seconds_left(5, 10, 10.0), 10.0);
  EXPECT_DOUBLE_EQ(seconds_left(1, 4, 2.5), 7.5);
  EXPECT_EQ(seconds_left(10, 10, 99.0), 0.0);
  EXPECT_LT(seconds_left(0, 10, 3.0), 0.0);  // unknown before the first case
  EXPECT_EQ(duration_text(-1), "?");
  EXPECT_EQ(duration_text(12.4), "12s");
  EXPECT_EQ(duration_text(185), "3m05s");
  EXPECT_EQ(duration_text(3720), "1h02m");
  const std::string line = progress_line(5, 10, 10.0, "gaussian-s1", 80);
  EXPECT_NE(line.find(" 50% 5/10 ~10s left"), std::string::npos) << line;
  EXPECT_NE(line.find("[" + std::string(20, '#')), std::string::npos) << line;  // half of a 40-cell bar
  EXPECT_NE(line.find("gaussian-s1"), std::string::npos);
  EXPECT_LE(progress_line(3, 1000, 1.0, std::string(300, 'x'), 40).size(), 40u);
}

TEST(Progress, DrawsNothingWhenTheStreamIsNotATerminal) {
  std::FILE* file = std::tmpfile();
  ASSERT_NE(file, nullptr);
  {
    ProgressBar bar(3, file);
    EXPECT_FALSE(bar.enabled());
    bar.update(1, "a");
    bar.update(3, "c");
  }
  EXPECT_EQ(std::ftell(file), 0L);
  {
    ProgressBar forced(3, file, true);  // enabled by hand: draws, then clears
    forced.update(3, "done");
  }
  EXPECT_GT(std::ftell(file), 0L);
  std::fclose(file);
}

// ----- Markdown ------------------------------------------------------------------

TEST(Markdown, HasCoverageWithUntriedFamiliesTheDisclaimerAndTheFiveWorstInOrder) {
  RunRecord r = seven_cases();
  r.skipped = {"masks-s9-1x1x1x4x4x8x8-dense: kernel declares no dense mask"};
  const std::string md = markdown_report(r);
  const std::string cov = section(md, "## Coverage");
  ASSERT_FALSE(cov.empty());
  EXPECT_NE(cov.find("**Families not tried**: large_logits, near_ties"), std::string::npos) << cov;
  EXPECT_NE(cov.find("block_gaussian"), std::string::npos);
  EXPECT_NE(cov.find("**Masks not tried**: causal_top_left"), std::string::npos);
  EXPECT_NE(cov.find("GQA not tried"), std::string::npos);
  EXPECT_NE(cov.find("No masked case was tried"), std::string::npos);
  EXPECT_NE(cov.find("No block-level case was tried"), std::string::npos);
  EXPECT_NE(cov.find("kernel declares no dense mask"), std::string::npos);  // the skipped case, listed
  EXPECT_NE(md.find(kEvidenceNotProof), std::string::npos);
  EXPECT_NE(md.find("A pass is evidence over the cases tried, not a proof"), std::string::npos);

  const std::string worst = section(md, "## The 5 worst cases");
  ASSERT_FALSE(worst.empty());
  std::size_t at = 0;
  for (const char* name : {"g-7", "m-6", "g-5", "m-4", "g-3"}) {
    const auto p = worst.find(std::string("`") + name + "`", at);
    ASSERT_NE(p, std::string::npos) << name << " missing or out of order";
    const auto replay = worst.find(std::string("--case ") + name, p);
    EXPECT_NE(replay, std::string::npos) << "no replay for " << name;
    at = p + 1;
  }
  EXPECT_EQ(worst.find("`g-2`"), std::string::npos);  // sixth: not listed
  EXPECT_EQ(worst.find("`m-1`"), std::string::npos);

  EXPECT_NE(section(md, "## Faults").find("No fault of any class was detected"), std::string::npos);
  r.cases[0].faults["mask_leak"] = 1;  // a fault without details: not "no fault"
  EXPECT_EQ(section(markdown_report(r), "## Faults").find("No fault of any class"), std::string::npos);
  const std::string budget = section(md, "## Error budget");
  // No case has a ULP limit: no ULP column. Margin = the smallest limit ÷ figure (g-7: 8 / 7).
  EXPECT_NE(budget.find("| gaussian | float32 | 4 | **1** | 7 | 8 | 2.086e-07 | 2.384e-07 | 1.5 | 4 | 1.14 |"),
            std::string::npos)
      << budget;
  EXPECT_EQ(budget.find("worst ULP"), std::string::npos) << budget;
  // The smallest margin comes before any section.
  const auto margin = md.find("**Smallest margin: 1.14** (max_scaled_error in case `g-7`");
  EXPECT_NE(margin, std::string::npos);
  EXPECT_LT(margin, md.find("## "));
}

// An int8 kernel judged by relative RMSE alone, being its own plain kernel.
RunRecord int8_record() {
  RunRecord r = seven_cases();
  r.input_format = "int8";
  for (auto& c : r.cases) {
    c.format = "int8";
    c.figures.max_scaled_error = 1.68e7;
    c.figures.max_ulp = 2e9;
    c.figures.ratio_to_plain = std::nan("");
    c.limits.max_scaled_error = INFINITY;
    c.limits.max_ulp = INFINITY;
    c.limits.max_ratio_to_plain = 4;
  }
  r.cases[0].reference_certified = false;
  r.cases[3].reference_certified = false;
  return r;
}

TEST(Markdown, ShowsOnlyFiguresALimitAppliesToAndExplainsUncertifiedReferencesOnce) {
  const std::string md = markdown_report(int8_record());
  const std::string budget = section(md, "## Error budget");
  EXPECT_EQ(budget.find("scaled"), std::string::npos) << budget;
  EXPECT_EQ(budget.find("ULP"), std::string::npos) << budget;
  EXPECT_EQ(budget.find("ratio"), std::string::npos) << budget;
  EXPECT_NE(budget.find("rel. RMSE limit"), std::string::npos) << budget;
  EXPECT_EQ(md.find("1.68e+07"), std::string::npos);
  EXPECT_NE(md.find("not shown: ULP distance, scaled error, ratio to plain"), std::string::npos);
  std::size_t said = 0;
  for (auto p = md.find("could not certify"); p != std::string::npos; p = md.find("could not certify", p + 1)) ++said;
  EXPECT_EQ(said, 1u);
  EXPECT_NE(md.find("In 2 of 7 cases the reference could not certify"), std::string::npos);
}

TEST(Terminal, TableHasAMarginColumnAndOnlyLimitedFigures) {
  const std::string text = terminal_summary(seven_cases(), false);
  EXPECT_NE(text.find("margin"), std::string::npos);
  EXPECT_NE(text.find("smallest margin 1.14 (max_scaled_error in case g-7"), std::string::npos) << text;
  EXPECT_LT(text.find("smallest margin"), text.find("family"));
  const std::string int8 = terminal_summary(int8_record(), false);
  EXPECT_EQ(int8.find("worst ulp"), std::string::npos) << int8;
  EXPECT_EQ(int8.find("worst scaled"), std::string::npos) << int8;
  EXPECT_NE(int8.find("worst rel rmse"), std::string::npos) << int8;
}

TEST(Markdown, EscapesNamesSoTheyCannotBreakATable) {
  RunRecord r = make_record({make_case("a|b<script>", "fam|<b>ily", 1, 1)});
  r.cases[0].replay = "headroom replay x";
  const std::string md = markdown_report(r);
  EXPECT_NE(md.find("| fam\\|&lt;b&gt;ily | float32 |"), std::string::npos) << md;  // a cell, not two
  EXPECT_EQ(md.find("<b>"), std::string::npos);
  // The case name's tag appears only inside inline code, where Markdown shows it as text.
  std::size_t tags = 0, in_code = 0;
  for (auto p = md.find("<script>"); p != std::string::npos; p = md.find("<script>", p + 1)) ++tags;
  for (auto p = md.find("`a|b<script>`"); p != std::string::npos; p = md.find("`a|b<script>`", p + 1)) ++in_code;
  EXPECT_GT(tags, 0u);
  EXPECT_EQ(tags, in_code);
}

TEST(Markdown, AnEmptyRunSaysSoRatherThanPassing) {
  const std::string md = markdown_report(make_record({}));
  EXPECT_NE(md.find("No case was run"), std::string::npos);
}

// ----- JUnit ---------------------------------------------------------------------

// Parses the XML with Python's xml.etree (an independent, strict parser) and
// returns what it printed, or "" when it did not parse.
std::string parse_junit(const fs::path& xml) {
  const fs::path script = xml.parent_path() / "check.py";
  std::ofstream(script) << "import sys, xml.etree.ElementTree as ET\n"
                           "root = ET.parse(sys.argv[1]).getroot()\n"
                           "cases = root.findall('.//testcase')\n"
                           "print('suites', root.tag, root.get('tests'), root.get('failures'))\n"
                           "for c in cases:\n"
                           "    f = c.find('failure')\n"
                           "    s = c.find('skipped')\n"
                           "    print('case', c.get('classname'), c.get('name'), 'FAILED' if f is not None else "
                           "('SKIPPED' if s is not None else 'ok'))\n"
                           "    if f is not None:\n"
                           "        sys.stdout.flush()\n"
                           "        sys.stdout.buffer.write(('text ' + f.text + '\\n').encode('utf-8'))\n";
  const fs::path out = xml.parent_path() / "out.txt";
  const std::string cmd = "/usr/bin/python3 " + script.string() + " " + xml.string() + " > " + out.string() + " 2>&1";
  const int rc = std::system(cmd.c_str());
  return rc == 0 ? read_file(out) : "";
}

// A block kernel that declined 15 block cases and could not take 4 more ran 2
// of 21: every face must say so rather than print a plain "pass".
TEST(ThinCoverage, EveryFaceAndTheJsonSayHowFewCasesOfALevelTheKernelTook) {
  std::vector<CaseRecord> cases;
  for (int i = 0; i < 17; ++i) {
    CaseRecord c = make_case("block_gaussian-s" + std::to_string(900 + i), "block_gaussian", 0.5, 1);
    c.level = "block";
    c.shape = "1,8,8,512,8,8,64,64";
    if (i >= 2) {
      c.faults["unsupported"] = 1;  // what judge.cpp records for a declined case
      c.figures = CaseFigures{};
    }
    cases.push_back(c);
  }
  RunRecord r = make_record(cases);
  for (int i = 0; i < 4; ++i) r.skipped.push_back("block_gaussian-s" + std::to_string(950 + i) + "-z20: mask dense");
  r.skipped.push_back("gaussian-s1-z20-1x2x2x8x8x16x16-none: the kernel is block-level");  // another level: not counted
  ASSERT_EQ(r.verdict(), "pass");
  const std::string line = "pass on 2 of 21 block cases";
  EXPECT_EQ(r.verdict_line(), line);
  const nlohmann::json j = to_json(r);
  EXPECT_EQ(j.at("verdict"), "pass");  // the machine field keeps its two values
  EXPECT_EQ(j.at("verdict_line"), line);
  ASSERT_EQ(j.at("levels").size(), 1u);
  EXPECT_EQ(j.at("levels")[0].at("taken"), 2);
  EXPECT_EQ(j.at("levels")[0].at("of"), 21);
  EXPECT_NE(terminal_summary(r, false).find(": " + line + "\n"), std::string::npos) << terminal_summary(r, false);
  EXPECT_NE(markdown_report(r).find("— PASS on 2 of 21 block cases\n"), std::string::npos);
  EXPECT_NE(markdown_report(r).find("took 2 of the 21 block-level cases"), std::string::npos);
  EXPECT_NE(html_report(r).find("PASS</span> on 2 of 21 block cases</h1>"), std::string::npos);
  EXPECT_NE(junit_report(r).find("name=\"verdict_line\" value=\"" + line + "\""), std::string::npos);

  // Half taken is not thin; a level with no case run (all skipped) is another kernel's.
  for (int i = 2; i < 9; ++i) r.cases[static_cast<std::size_t>(i)].faults.clear();
  r.skipped.resize(1);
  r.skipped[0] = "block_gaussian-s990: mask dense";
  EXPECT_EQ(r.level_takes()[0].taken, 9u);
  EXPECT_EQ(r.level_takes()[0].of, 18u);
  EXPECT_EQ(r.verdict_line(), "pass");
  EXPECT_EQ(to_json(r).at("verdict_line"), "pass");
}

TEST(JUnit, IsWellFormedWithOneTestcasePerFamilyAndFormatAndFailuresWithReplays) {
  RunRecord r = seven_cases();
  r.cases[1].reasons.push_back("odd <&> \"quotes\" 'here' \x01 and bad utf-8 \xff end");
  r.cases[1].fault_details = {"mask_leak: key 4 of row 0 leaks"};
  r.skipped = {"attention_sink-s1-1x1x1x4x4x8x8-none: kernel declares no such shape"};
  const auto dir = fresh_dir("junit");
  write_reports(r, ReportOptions{{}, {}, dir / "r.xml"});
  const std::string parsed = parse_junit(dir / "r.xml");
  ASSERT_FALSE(parsed.empty()) << "xml.etree could not parse:\n" << read_file(dir / "r.xml");
  EXPECT_NE(parsed.find("suites testsuites 3 1"), std::string::npos) << parsed;
  EXPECT_NE(parsed.find("case headroom.f32_tiled.float32 gaussian FAILED"), std::string::npos) << parsed;
  EXPECT_NE(parsed.find("case headroom.f32_tiled.float32 masks ok"), std::string::npos);
  EXPECT_NE(parsed.find("case headroom.f32_tiled.float32 attention_sink SKIPPED"), std::string::npos);
  EXPECT_NE(parsed.find("replay: headroom replay --kernel f32_tiled --family gaussian"), std::string::npos);
  // Escaped, then read back as written; the control character and the bad byte as U+FFFD.
  EXPECT_NE(parsed.find("odd <&> \"quotes\" 'here' \xEF\xBF\xBD and bad utf-8 \xEF\xBF\xBD end"), std::string::npos)
      << parsed;
  EXPECT_NE(parsed.find("max_scaled_error 7 > 6"), std::string::npos);
}

// Each gradient tensor's figure, each way, lands under its own name: a figure
// dropped or given to another tensor or way changes a property or the line.
TEST(JUnit, CarriesEachGradientsWorstFigureBothWaysAndWhichGradientsWereJudged) {
  RunRecord r = seven_cases();
  EXPECT_NE(junit_report(r).find("name=\"gradients_judged\" value=\"none (the kernel has no backward entry"),
            std::string::npos);
  EXPECT_EQ(junit_report(r).find("d_q.fed_exact"), std::string::npos);
  BackwardFigures b;
  b.upstream = "one_hot";
  for (std::size_t t = 0; t < 3; ++t) {
    b.fed_exact[t].max_scaled_error = 1.5 + static_cast<double>(t);  // d_q 1.5, d_k 2.5, d_v 3.5
    b.end_to_end[t].max_scaled_error = 11 + static_cast<double>(t);  // 11, 12, 13
  }
  b.bias_judged = true;  // gaussian: d_bias judged too, 4.5 and 14
  b.fed_exact[3].max_scaled_error = 4.5;
  b.end_to_end[3].max_scaled_error = 14;
  r.cases[1].backward = b;  // gaussian
  b.bias_judged = false;
  b.fed_exact[3].max_scaled_error = 40;  // not judged: must not show
  b.fed_exact[1].max_scaled_error = 20;  // masks: d_k fed exact 20, end to end not judged
  b.end_to_end_judged = false;
  r.cases[4].backward = b;
  const auto dir = fresh_dir("junit_gradients");
  write_reports(r, ReportOptions{{}, {}, dir / "r.xml"});
  ASSERT_FALSE(parse_junit(dir / "r.xml").empty()) << read_file(dir / "r.xml");
  const std::string x = read_file(dir / "r.xml");
  for (const auto& [name, value] : {std::pair{"d_q.fed_exact", "1.5"}, {"d_k.fed_exact", "20"}, {"d_v.fed_exact", "3.5"},
                                    {"d_q.end_to_end", "11"}, {"d_k.end_to_end", "12"}, {"d_v.end_to_end", "13"},
                                    {"d_bias.fed_exact", "4.5"}, {"d_bias.end_to_end", "14"}})
    EXPECT_NE(x.find(std::string("<property name=\"") + name + ".max_scaled_error\" value=\"" + value + "\"/>"),
              std::string::npos)
        << name << " " << value << "\n" << x;
  EXPECT_NE(x.find("name=\"gradients_judged\" value=\"dQ, dK, dV on 2 cases: fed the exact O and lse on 2, end to end "
                   "on 1; d(bias) on 1; dO one_hot (2)\""),
            std::string::npos)
      << x;
  // Per family: gaussian's own figures; masks judged fed exact only.
  EXPECT_NE(x.find("gradients (1 case, 1 end to end): d_q worst scaled error fed the exact O and lse 1.5, end to end "
                   "11; d_k worst scaled error fed the exact O and lse 2.5, end to end 12; d_v worst scaled error fed "
                   "the exact O and lse 3.5, end to end 13; d_bias worst scaled error fed the exact O and lse 4.5, end to "
                   "end 14"),
            std::string::npos)
      << x;
  EXPECT_NE(x.find("gradients (1 case, 0 end to end): d_q worst scaled error fed the exact O and lse 1.5, end to end "
                   "—; d_k worst scaled error fed the exact O and lse 20, end to end —"),
            std::string::npos)
      << x;
}

// ----- compare -------------------------------------------------------------------

TEST(Compare, DetectsARegressionBeyondToleranceAndAnImprovement) {
  const RunRecord base = seven_cases();
  RunRecord next = base;
  next.cases[1].figures.max_scaled_error = 7 * 1.5;  // gaussian worst scaled error +50 %
  next.cases[4].figures.max_scaled_error = 2;        // masks worst scaled error 6 → 4 (m-4)
  next.cases[4].figures.max_ulp = 1;
  const Comparison c = compare_records(base, next, 0.10);
  ASSERT_TRUE(c.regressed());
  ASSERT_EQ(c.regressions.size(), 1u);
  EXPECT_EQ(c.regressions[0].family, "gaussian");
  EXPECT_EQ(c.regressions[0].figure, "worst_scaled_error");
  EXPECT_DOUBLE_EQ(c.regressions[0].relative, 0.5);
  bool better = false;
  for (const auto& i : c.improvements) better |= i.family == "masks" && i.figure == "worst_scaled_error" && i.next == 4;
  EXPECT_TRUE(better);
  EXPECT_NE(comparison_text(c).find("REGRESSION kernel=f32_tiled family=gaussian format=float32 worst_scaled_error 7 → 10.5 (+50.0%)"),
            std::string::npos)
      << comparison_text(c);
  EXPECT_NE(comparison_text(c).find("BETTER"), std::string::npos);
  // Within a 60 % tolerance the same change is no regression.
  EXPECT_FALSE(compare_records(base, next, 0.60).regressed());
}

TEST(Compare, GradientScaledErrorsRegressEachWayPastToleranceAndFloor) {
  RunRecord base = seven_cases();
  BackwardFigures b;
  b.upstream = "gaussian";
  for (std::size_t t = 0; t < 3; ++t) {
    b.fed_exact[t].max_scaled_error = 4 + static_cast<double>(t);  // worst 6 (d_v)
    b.end_to_end[t].max_scaled_error = 10;
  }
  base.cases[1].backward = b;  // gaussian
  base.cases[4].backward = b;  // masks
  RunRecord next = base;
  next.cases[1].backward->end_to_end[0].max_scaled_error = 15;  // gaussian end to end 10 → 15
  next.cases[4].backward->fed_exact[1].max_scaled_error = 3;    // masks fed exact 6 → 4 (d_q's)
  next.cases[4].backward->fed_exact[2].max_scaled_error = 3;
  next.cases[1].backward->fed_exact[2].max_scaled_error = 6.5;  // within 10 %: no change
  const Comparison c = compare_records(base, next, 0.10);
  ASSERT_EQ(c.regressions.size(), 1u) << comparison_text(c);
  EXPECT_EQ(c.regressions[0].family, "gaussian");
  EXPECT_EQ(c.regressions[0].figure, "worst_gradient_scaled_error_end_to_end");
  EXPECT_EQ(c.regressions[0].base, 10);
  EXPECT_EQ(c.regressions[0].next, 15);
  ASSERT_EQ(c.improvements.size(), 1u) << comparison_text(c);
  EXPECT_EQ(c.improvements[0].family, "masks");
  EXPECT_EQ(c.improvements[0].figure, "worst_gradient_scaled_error");
  EXPECT_EQ(c.improvements[0].next, 4);
  // A 1-unit rise is under the floor (one rounding unit), whatever the tolerance.
  RunRecord small = base;
  small.cases[1].backward->fed_exact[2].max_scaled_error = 7;
  EXPECT_FALSE(compare_records(base, small, 0.0).regressed());
  // Gradients no longer judged: a note, not a regression.
  RunRecord none = base;
  for (auto& k : none.cases) k.backward.reset();
  const Comparison gone = compare_records(base, none, 0.10);
  EXPECT_FALSE(gone.regressed());
  bool noted = false;
  for (const auto& n : gone.notes) noted |= n.find("worst_gradient_scaled_error") != std::string::npos;
  EXPECT_TRUE(noted);
}

TEST(Compare, AnyNewFaultRegressesWhateverTheToleranceAndALostFamilyToo) {
  const RunRecord base = seven_cases();
  RunRecord next = base;
  next.cases[2].faults["non_finite"] = 1;
  const Comparison c = compare_records(base, next, 1000.0);
  ASSERT_EQ(c.regressions.size(), 1u);
  EXPECT_EQ(c.regressions[0].figure, "fault:non_finite");
  EXPECT_TRUE(std::isinf(c.regressions[0].relative));

  RunRecord fewer = base;
  std::erase_if(fewer.cases, [](const CaseRecord& k) { return k.family == "masks"; });
  const Comparison lost = compare_records(base, fewer, 0.1);
  ASSERT_EQ(lost.regressions.size(), 1u);
  EXPECT_EQ(lost.regressions[0].figure, "cases");
  // From base 0 any error is a regression (exact became inexact).
  RunRecord exact = base, inexact = base;
  for (auto& k : exact.cases) k.figures.max_ulp = 0;
  EXPECT_TRUE(compare_records(exact, inexact, 0.1).regressed());
  EXPECT_FALSE(compare_records(base, base, 0.0).regressed());
}

TEST(Compare, OneUlpIsNoiseAndTheTableSummarisesEveryGroup) {
  RunRecord base = seven_cases();
  for (auto& k : base.cases) k.figures.max_ulp = 0;
  RunRecord next = base;
  next.cases[1].figures.max_ulp = 1;  // 0 → 1 ULP: noise, whatever the tolerance
  EXPECT_FALSE(compare_records(base, next, 0.1).regressed());
  next.cases[1].figures.max_ulp = 2;  // 0 → 2 ULP: a regression
  const Comparison c = compare_records(base, next, 0.1);
  ASSERT_TRUE(c.regressed());
  EXPECT_EQ(c.regressions[0].figure, "worst_ulp");
  ASSERT_EQ(c.groups.size(), 2u);
  EXPECT_EQ(c.groups[0].status, "worse");
  EXPECT_EQ(c.groups[1].status, "same");
  const std::string text = comparison_text(c);
  EXPECT_NE(text.find("  family   format  cases worst ulp"), std::string::npos) << text;
  EXPECT_NE(text.find("  gaussian float32 4     0 → 2"), std::string::npos) << text;
}

TEST(Compare, RunCompareExits1OnRegression0OtherwiseAndWritesJson) {
  const auto dir = fresh_dir("compare");
  const RunRecord base = seven_cases();
  RunRecord worse = base;
  worse.cases[0].figures.relative_rmse *= 4;  // g-3: 3 → 12 · 2^-25, past the group's 7 · 2^-25 by over u
  write_run_record(base, dir / "base.json");
  write_run_record(worse, dir / "worse.json");
  std::ostringstream out;
  EXPECT_EQ(run_compare(dir / "base.json", dir / "base.json", 0.1, {}, out), 0);
  EXPECT_EQ(run_compare(dir / "base.json", dir / "worse.json", 0.1, dir / "cmp.json", out, dir / "cmp.md"), 1);
  const auto j = nlohmann::json::parse(read_file(dir / "cmp.json"));
  EXPECT_TRUE(j.at("regressed").get<bool>());
  EXPECT_EQ(j.at("regressions").at(0).at("figure"), "worst_rel_rmse");
  // Markdown for a pull request: the verdict, the per-group table, the regression.
  const std::string md = read_file(dir / "cmp.md");
  EXPECT_EQ(md.rfind("## headroom compare: REGRESSION\n", 0), 0u) << md;
  EXPECT_NE(md.find("| gaussian | float32 | 4 | 9 | 7 | 2.086e-07 → 3.576e-07 | 1 | 0 | **worse** |"), std::string::npos)
      << md;
  EXPECT_NE(md.find("| masks | float32 | 3 | 3 | 6 | 1.788e-07 | 0 | 0 | same |"), std::string::npos) << md;
  // Improvement only: exit 0.
  EXPECT_EQ(run_compare(dir / "worse.json", dir / "base.json", 0.1, {}, out), 0);
}

TEST(Compare, MalformedOrSchemaMismatchedFilesAreInputErrors) {
  const auto dir = fresh_dir("compare_bad");
  write_run_record(seven_cases(), dir / "good.json");
  std::ofstream(dir / "bad.json") << "{\"schema\": 1, ";
  auto j = to_json(seven_cases());
  j["schema"] = 2;
  std::ofstream(dir / "future.json") << j.dump();
  std::ostringstream out;
  try {
    run_compare(dir / "good.json", dir / "bad.json", 0.1, {}, out);
    FAIL() << "accepted a malformed file";
  } catch (const InputError& e) {
    EXPECT_NE(std::string(e.what()).find("bad.json"), std::string::npos);
  }
  try {
    run_compare(dir / "future.json", dir / "good.json", 0.1, {}, out);
    FAIL() << "accepted schema 2";
  } catch (const InputError& e) {
    EXPECT_NE(std::string(e.what()).find("future.json"), std::string::npos);
    EXPECT_NE(std::string(e.what()).find("schema"), std::string::npos);
  }
  EXPECT_THROW(run_compare(dir / "good.json", dir / "good.json", -0.1, {}, out), InputError);
  EXPECT_THROW(run_compare(dir / "good.json", dir / "good.json", NAN, {}, out), InputError);
}

// ----- merge ---------------------------------------------------------------------

TEST(Merge, ThreeShardsEqualTheUnshardedRecord) {
  RunRecord whole = seven_cases();
  whole.skipped = {"masks-z: kernel declares no dense mask"};
  whole.tolerated_faults = {"nondeterministic"};
  sort_canonically(whole);
  std::vector<MergeInput> shards;
  for (int i = 0; i < 3; ++i) {
    RunRecord s = whole;
    s.shard = std::to_string(i + 1) + "/3";
    s.cases.clear();
    s.skipped.clear();
    // Reverse order inside a shard: merge must sort.
    for (std::size_t k = whole.cases.size(); k-- > 0;)
      if (static_cast<int>(k % 3) == i) s.cases.push_back(whole.cases[k]);
    if (i == 2) s.skipped = whole.skipped;
    shards.push_back({"shard" + std::to_string(i + 1) + ".json", s});
  }
  std::swap(shards[0], shards[2]);  // order of files does not matter
  const MergeResult m = merge_records(shards);
  EXPECT_TRUE(m.notes.empty());
  EXPECT_EQ(m.record.shard, "merged");
  EXPECT_EQ(m.record.command, "merge");
  RunRecord expected = whole;
  expected.shard = "merged";
  expected.command = "merge";
  EXPECT_EQ(to_json(m.record), to_json(expected));
  // Through files too.
  const auto dir = fresh_dir("merge");
  std::vector<fs::path> files;
  for (const auto& s : shards) {
    files.push_back(dir / s.file);
    write_run_record(s.record, files.back());
  }
  EXPECT_EQ(to_json(merge_files(files).record), to_json(expected));
  // Missing a shard: refused, unless allowed; then the verdict says partial, and survives a write and read.
  files.pop_back();
  try {
    merge_files(files);
    ADD_FAILURE() << "merged two shards of three without --allow-partial";
  } catch (const InputError& e) {
    EXPECT_NE(e.problem().find("shard 1/3 missing"), std::string::npos) << e.what();
    EXPECT_NE(e.fix().find("--allow-partial"), std::string::npos) << e.what();
  }
  const MergeResult part = merge_files(files, true);
  ASSERT_EQ(part.notes.size(), 1u);
  EXPECT_NE(part.notes[0].find("missing"), std::string::npos);
  EXPECT_EQ(part.record.missing_shards, std::vector<std::string>{"1/3"});
  EXPECT_EQ(part.record.verdict().rfind("partial_", 0), 0u) << part.record.verdict();
  write_run_record(part.record, dir / "partial.json");
  EXPECT_EQ(read_run_record(dir / "partial.json").verdict(), part.record.verdict());
  // A partial merged record merged again stays partial, unless the missing shard comes too.
  const auto again = merge_files({dir / "partial.json"}, true);
  EXPECT_EQ(again.record.missing_shards, std::vector<std::string>{"1/3"});
  EXPECT_THROW(merge_files({dir / "partial.json"}), InputError);
}

// Records are validated on read like case folders: nonsense is refused, naming the field.
TEST(Records, NonsenseIsRefusedNamingTheField) {
  const auto dir = fresh_dir("nonsense");
  const nlohmann::json good = to_json(seven_cases());
  write_run_record(seven_cases(), dir / "good.json");
  ASSERT_NO_THROW(read_run_record(dir / "good.json"));
  auto refused = [&](nlohmann::json j, const std::string& part) {
    std::ofstream(dir / "bad.json") << j.dump();
    try {
      read_run_record(dir / "bad.json");
      ADD_FAILURE() << "accepted: " << part;
    } catch (const InputError& e) {
      EXPECT_NE(std::string(e.what()).find(part), std::string::npos) << e.what();
    }
  };
  auto j = good;
  j["cases"][0]["limits"]["max_scaled_error"] = -1;
  refused(j, "field \"max_scaled_error\": -1 is out of range");
  j = good;
  j["verdict"] = "maybe";
  refused(j, "field \"verdict\": \"maybe\"");
  j = good;
  j["cases"][0]["faults"] = {{"gremlins", 1}};
  refused(j, "\"gremlins\" is not a fault class");
  j = good;
  j["cases"][0]["name"] = "../../etc/passwd";
  refused(j, "is not a valid case name");
  j = good;
  j["cases"][1]["name"] = j["cases"][0]["name"];
  refused(j, "is also cases[0]");
  j = good;
  j["shard"] = "3/2";
  refused(j, "field \"shard\": \"3/2\"");
  j = good;
  j["command"] = "rm";
  refused(j, "field \"command\": \"rm\" is not one of");
  j = good;
  j["shard"] = "merged";  // only merge writes a merged record
  refused(j, "field \"shard\": \"merged\"");
  j = good;
  j["verdict_line"] = "pass on 21 of 21 block cases";
  refused(j, "field \"verdict_line\"");
  j = good;
  j["levels"][0]["taken"] = 0;
  refused(j, "field \"levels\"");
  // The kernel's name follows a declaration's rules, the formats are formats (tools/attack.py found both accepted).
  j = good;
  j["kernel"] = std::string("f32\0textbook", 12);
  refused(j, "field \"kernel\": \"f32\\x00textbook\" is not a kernel name");
  j = good;
  j["input_format"] = "float24";
  refused(j, "field \"input_format\": \"float24\" is not a format");
  j = good;
  j["output_format"] = "";
  refused(j, "field \"output_format\"");
  // replay names the second folder holding a case "<name>@<folder>" (cmd_replay.cpp): read back,
  // but the part before "@" follows the case-name rules and the folder holds no control byte.
  j = good;
  j["cases"][0]["name"] = j["cases"][0]["name"].get<std::string>() + "@corpora/copy/x";
  std::ofstream(dir / "replayed.json") << j.dump();
  EXPECT_NO_THROW(read_run_record(dir / "replayed.json"));
  j["cases"][0]["name"] = "../../etc/passwd@x";
  refused(j, "is not a valid case name");
  j["cases"][0]["name"] = "g-1@a\nb";
  refused(j, "\"g-1@a\\x0Ab\" is not a valid case name");
  j = good;
  j["cases"][0]["name"] = std::string("a\0b", 3) + std::string(300, 'x');
  refused(j, "\"a\\x00bxxx");
  refused(j, "(cut at byte 80 of 303)");
  std::ofstream(dir / "big.json") << "{\"schema\": 1e400}";
  try {
    read_run_record(dir / "big.json");
    ADD_FAILURE() << "accepted 1e400";
  } catch (const InputError& e) {
    EXPECT_EQ(e.place(), "line 1, column 12") << e.what();
  }
}

TEST(Merge, RefusesDuplicatesAndMismatchesNamingTheFile) {
  RunRecord a = seven_cases(), b = seven_cases();
  a.shard = "1/2";
  b.shard = "2/2";
  b.cases = {make_case("g-3", "gaussian", 1, 1)};  // also in a
  try {
    merge_records({{"a.json", a}, {"b.json", b}});
    FAIL() << "merged a duplicate case";
  } catch (const InputError& e) {
    EXPECT_EQ(e.file(), "b.json");
    EXPECT_NE(e.problem().find("\"g-3\" is also in a.json"), std::string::npos) << e.what();
  }
  b.cases = {make_case("new", "gaussian", 1, 1)};
  b.kernel = "other";
  try {
    merge_records({{"a.json", a}, {"b.json", b}});
    FAIL() << "merged two kernels";
  } catch (const InputError& e) {
    EXPECT_EQ(e.file(), "b.json");
    EXPECT_NE(e.place().find("kernel"), std::string::npos);
  }
  b.kernel = a.kernel;
  b.suite = "deep";
  EXPECT_THROW(merge_records({{"a.json", a}, {"b.json", b}}), InputError);
  b.suite = a.suite;
  b.shard = "1/2";  // the same shard twice
  EXPECT_THROW(merge_records({{"a.json", a}, {"b.json", b}}), InputError);
  b.shard = "2/3";  // a different split
  EXPECT_THROW(merge_records({{"a.json", a}, {"b.json", b}}), InputError);
  b.shard = "banana";
  EXPECT_THROW(merge_records({{"a.json", a}, {"b.json", b}}), InputError);
  b.shard = "2/2";
  EXPECT_NO_THROW(merge_records({{"a.json", a}, {"b.json", b}}));
  EXPECT_THROW(merge_records({}), InputError);
}

// ----- writing -------------------------------------------------------------------

TEST(Reports, WriteReportsWritesEachRequestedFileAndNamesAnUnwritableOne) {
  const auto dir = fresh_dir("write");
  const RunRecord r = seven_cases();
  write_reports(r, ReportOptions{dir / "r.md", dir / "r.html", dir / "r.xml"});
  EXPECT_EQ(read_file(dir / "r.md"), markdown_report(r));
  EXPECT_EQ(read_file(dir / "r.xml"), junit_report(r));
  EXPECT_TRUE(fs::file_size(dir / "r.html") > 1000);
  try {
    write_reports(r, ReportOptions{dir / "no" / "such" / "folder" / "r.md", {}, {}});
    FAIL() << "wrote into a missing folder";
  } catch (const InputError& e) {
    EXPECT_NE(std::string(e.what()).find("r.md"), std::string::npos);
  }
}

TEST(Reports, QuantisationSplitSaysWhatInputAndPRoundingCostBesideTheKernel) {
  // An 8-bit float kernel's run: the terminal summary and the Markdown report
  // give the largest input-rounding, P-rounding and kernel figures.
  RunRecord r = testing::make_record({testing::make_case("a", "gaussian", 1.2e6, 3), testing::make_case("b", "masks", 5e5, 2)});
  r.input_format = "e4m3";
  r.cases[0].figures.input_error = 3.5e9;
  r.cases[1].figures.input_error = 7e10;
  r.cases[0].figures.p_rounding_error = 1.1e6;
  r.cases[1].figures.p_rounding_error = 4e5;
  const std::string want = "inputs rounded to e4m3 cost up to 7e+10, P rounded to 8 bits up to 1.1e+06 (modelled), "
                           "the kernel's own error up to 1.2e+06 (max scaled error over 2 cases)";
  EXPECT_EQ(quantisation_split_text(r), want);
  EXPECT_NE(terminal_summary(r, false).find("quantisation split: " + want), std::string::npos);
  EXPECT_NE(markdown_report(r).find(want), std::string::npos);
  // Without P rounding the middle part is left out; a float32 run has no split.
  for (auto& c : r.cases) c.figures.p_rounding_error = std::nan("");
  EXPECT_EQ(quantisation_split_text(r).find("P rounded"), std::string::npos);
  r.input_format = "float32";
  EXPECT_EQ(quantisation_split_text(r), "");
  EXPECT_EQ(terminal_summary(r, false).find("quantisation split"), std::string::npos);
}

}  // namespace
}  // namespace headroom
