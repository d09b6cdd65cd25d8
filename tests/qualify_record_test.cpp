// Tests of the run record (record.h) and the journal (journal.h).
#include <gtest/gtest.h>

#include <cmath>
#include <filesystem>
#include <fstream>
#include <iterator>

#include "headroom/input_error.h"
#include "headroom/journal.h"
#include "headroom/record.h"

namespace headroom {
namespace {

namespace fs = std::filesystem;

fs::path fresh_dir(const std::string& name) {
  fs::path d = fs::temp_directory_path() / ("headroom_record_test_" + name + "_" + std::to_string(::getpid()));
  fs::remove_all(d);
  fs::create_directories(d);
  return d;
}

CaseRecord sample_case(const std::string& name, bool within) {
  CaseRecord c;
  c.name = name;
  c.family = "gaussian";
  c.seed = 18446744073709551615ull;  // the largest seed must survive JSON
  c.size = 10;
  c.level = "core";
  c.shape = "1,2,1,3,5,4,4";
  c.kv_len = 5;
  c.logit_scale = 3.5;
  c.mask = "causal_bottom_right";
  c.format = "binary16";
  c.figures.max_ulp = 2;
  c.figures.lse_error = std::nan("");
  c.figures.ratio_to_plain = INFINITY;
  c.faults["mask_leak"] = 1;
  c.fault_details = {"mask_leak: key 4 of row 0 leaks"};
  c.within_budget = within;
  c.reasons = within ? std::vector<std::string>{} : std::vector<std::string>{"max_ulp 2 > 1"};
  c.replay = "headroom replay --kernel k corpus/x";
  c.ulp_histogram = {1, 2, 3};
  return c;
}

// A record as `qualify` writes it (the reader refuses a command it does not know).
RunRecord qualify_record() {
  RunRecord r;
  r.command = "qualify";
  r.kernel = "f32_textbook";
  r.input_format = r.output_format = "float32";
  return r;
}

TEST(RunRecord, RoundTripsThroughJsonWithNonFiniteFigures) {
  RunRecord r = qualify_record();
  r.kernel = "f16_f32acc";
  r.input_format = r.output_format = "binary16";
  r.cases = {sample_case("a", true), sample_case("b", false)};
  const auto dir = fresh_dir("roundtrip");
  write_run_record(r, dir / "r.json");
  const RunRecord back = read_run_record(dir / "r.json");
  ASSERT_EQ(back.cases.size(), 2u);
  EXPECT_EQ(back.cases[0].seed, 18446744073709551615ull);
  EXPECT_TRUE(std::isnan(back.cases[0].figures.lse_error));
  EXPECT_TRUE(std::isinf(back.cases[0].figures.ratio_to_plain));
  EXPECT_EQ(back.cases[1].reasons, r.cases[1].reasons);
  EXPECT_EQ(to_json(back), to_json(r));
  EXPECT_EQ(back.verdict(), "fail");
  EXPECT_EQ(back.fault_totals().at("mask_leak"), 2);
}

TEST(RunRecord, LimitsAndToleratedFaultsRoundTrip) {
  RunRecord r = qualify_record();
  r.tolerated_faults = {"nondeterministic"};
  r.skipped = {"masks-s3: kernel declares no dense mask"};
  CaseRecord c = sample_case("a", true);
  c.limits.max_ulp = INFINITY;
  c.limits.max_scaled_error = 12.5;
  c.limits.max_rel_rmse = 0x1p-20;
  c.reference_certified = false;
  c.figures.worst_ulp_at = 3;
  r.warnings = {"b.toml line 3: [kernel.x] names no kernel of this run, so it is not applied"};
  r.cases = {c};
  const RunRecord back = run_record_from_json(to_json(r), "r.json");
  EXPECT_EQ(back.tolerated_faults, r.tolerated_faults);
  EXPECT_EQ(back.warnings, r.warnings);
  EXPECT_FALSE(back.cases[0].reference_certified);
  EXPECT_EQ(back.cases[0].figures.worst_ulp_at, 3);
  ASSERT_EQ(back.skipped.size(), 1u);
  EXPECT_EQ(back.skipped[0], "masks-s3: kernel declares no dense mask");
  EXPECT_TRUE(std::isinf(back.cases[0].limits.max_ulp));
  EXPECT_EQ(back.cases[0].limits.max_scaled_error, 12.5);
  EXPECT_EQ(back.cases[0].limits.max_rel_rmse, 0x1p-20);
  EXPECT_TRUE(std::isnan(back.cases[0].limits.max_ratio_to_plain));  // not recorded
  EXPECT_EQ(to_json(back), to_json(r));
}

TEST(RunRecord, RecordWithoutTheLaterOptionalFieldsStillReads) {
  RunRecord r = qualify_record();
  r.cases = {sample_case("a", true)};
  auto j = to_json(r);
  j.erase("tolerated_faults");
  j.erase("warnings");
  j.erase("verdict_line");
  j.erase("levels");
  j["cases"][0].erase("limits");
  j["cases"][0].erase("reference_certified");
  j["cases"][0]["figures"].erase("worst_ulp_at");
  const RunRecord back = run_record_from_json(j, "old.json");
  EXPECT_TRUE(back.tolerated_faults.empty());
  EXPECT_TRUE(back.warnings.empty());
  EXPECT_TRUE(back.cases[0].reference_certified);
  EXPECT_TRUE(std::isnan(back.cases[0].figures.worst_ulp_at));
  EXPECT_TRUE(std::isnan(back.cases[0].limits.max_scaled_error));
  j["cases"][0]["limits"] = {{"max_ulp", 1}};  // present but incomplete: named, not ignored
  try {
    run_record_from_json(j, "old.json");
    FAIL() << "accepted limits without max_scaled_error";
  } catch (const InputError& e) {
    EXPECT_NE(std::string(e.what()).find("cases[0] limits field \"max_scaled_error\""), std::string::npos) << e.what();
  }
}

TEST(RunRecord, SyntaxErrorNamesLineAndColumn) {
  const auto dir = fresh_dir("syntax");
  std::ofstream(dir / "bad.json") << "{\n  \"schema\": 1,\n  \"tool\": oops\n}\n";
  try {
    read_run_record(dir / "bad.json");
    FAIL() << "accepted invalid JSON";
  } catch (const InputError& e) {
    EXPECT_NE(std::string(e.what()).find("bad.json"), std::string::npos);
    EXPECT_NE(std::string(e.what()).find("line 3"), std::string::npos) << e.what();
  }
}

TEST(RunRecord, MissingFieldIsNamed) {
  auto j = to_json(qualify_record());
  j.erase("kernel");
  try {
    run_record_from_json(j, "r.json");
    FAIL() << "accepted a record without a kernel";
  } catch (const InputError& e) {
    EXPECT_NE(std::string(e.what()).find("\"kernel\""), std::string::npos) << e.what();
  }
  auto k = to_json(qualify_record());
  k["schema"] = 99;
  EXPECT_THROW(run_record_from_json(k, "r.json"), InputError);
}

TEST(Journal, ResumeKeepsFinishedCasesAndDropsATornLastLine) {
  const auto dir = fresh_dir("journal");
  const auto path = dir / "run.journal";
  {
    Journal j(path, "qualify k quick 1/1", false);
    j.append(sample_case("a", true));
    j.append(sample_case("b", false));
  }
  { std::ofstream(path, std::ios::app) << "{\"name\": \"c\", \"fam"; }  // a kill mid-write
  Journal again(path, "qualify k quick 1/1", true);
  EXPECT_EQ(again.size(), 2u);
  ASSERT_NE(again.find("b"), nullptr);
  EXPECT_FALSE(again.find("b")->within_budget);
  EXPECT_EQ(again.find("c"), nullptr);
  again.append(sample_case("c", true));
  Journal third(path, "qualify k quick 1/1", true);
  EXPECT_EQ(third.size(), 3u);
}

// A kill can cut a write just before its '\n': the case is whole and kept, and
// the cases appended after it must still start lines of their own, through
// a second and a third resume.
TEST(Journal, ACaseCutBeforeItsNewlineIsKeptAndLaterAppendsStayReadable) {
  const auto dir = fresh_dir("journal_newline");
  const auto path = dir / "run.journal";
  {
    Journal j(path, "qualify k quick 1/1", false);
    j.append(sample_case("a", true));
  }
  std::string text;
  {
    std::ifstream in(path, std::ios::binary);
    text.assign(std::istreambuf_iterator<char>(in), std::istreambuf_iterator<char>());
  }
  ASSERT_EQ(text.back(), '\n');
  text.pop_back();
  std::ofstream(path, std::ios::trunc) << text;
  {
    Journal again(path, "qualify k quick 1/1", true);
    EXPECT_EQ(again.size(), 1u);
    again.append(sample_case("b", true));
  }
  {
    Journal third(path, "qualify k quick 1/1", true);
    EXPECT_EQ(third.size(), 2u);
    third.append(sample_case("c", true));
  }
  Journal fourth(path, "qualify k quick 1/1", true);
  EXPECT_EQ(fourth.size(), 3u);
  EXPECT_NE(fourth.find("b"), nullptr);
}

TEST(Journal, RefusesAnotherRunsJournal) {
  const auto dir = fresh_dir("identity");
  { Journal j(dir / "run.journal", "qualify k quick 1/1", false); }
  EXPECT_THROW(Journal(dir / "run.journal", "qualify other quick 1/1", true), InputError);
}

TEST(Journal, WithoutResumeStartsAfresh) {
  const auto dir = fresh_dir("afresh");
  {
    Journal j(dir / "run.journal", "id", false);
    j.append(sample_case("a", true));
  }
  Journal j(dir / "run.journal", "id", false);
  EXPECT_EQ(j.size(), 0u);
}

}  // namespace
}  // namespace headroom
