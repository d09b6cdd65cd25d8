// headroom tests — the qualify stage's files under hostile conditions: strange JSON, a full disk, case names that look like paths.
#include <unistd.h>

#include <cstdio>
#include <filesystem>
#include <fstream>
#include <iterator>
#include <set>
#include <string>

#include <gtest/gtest.h>
#include <rapidcheck/gtest.h>

#include "full_disk.h"
#include "headroom/input_error.h"
#include "headroom/journal.h"
#include "headroom/qualify.h"
#include "headroom/record.h"

namespace headroom {
namespace {

namespace fs = std::filesystem;
using testing::ChildOutcome;
using testing::with_file_size_limit;

class TempDir {
 public:
  TempDir() {
    std::string tmpl = (fs::temp_directory_path() / "headroom-qualify-untrusted-XXXXXX").string();
    path_ = ::mkdtemp(tmpl.data());
  }
  ~TempDir() {
    std::error_code ec;
    fs::remove_all(path_, ec);
  }
  const fs::path& path() const { return path_; }

 private:
  fs::path path_;
};

std::string read_text(const fs::path& p) {
  std::ifstream in(p, std::ios::binary);
  return {std::istreambuf_iterator<char>(in), std::istreambuf_iterator<char>()};
}

void write_text(const fs::path& p, const std::string& text) {
  std::ofstream out(p, std::ios::binary | std::ios::trunc);
  out << text;
}

std::set<std::string> listing(const fs::path& dir) {
  std::set<std::string> names;
  for (const auto& e : fs::directory_iterator(dir)) names.insert(e.path().filename().string());
  return names;
}

bool contains(const std::string& s, const std::string& part) { return s.find(part) != std::string::npos; }

CaseRecord case_record(const std::string& name, std::size_t detail_bytes = 0) {
  CaseRecord c;
  c.name = name;
  c.family = "gaussian";
  c.level = "core";
  c.shape = "1,1,1,2,3,4,4";
  c.mask = "none";
  c.format = "float32";
  c.replay = "headroom replay --kernel f32_textbook case-" + name;
  if (detail_bytes) c.fault_details.push_back(std::string(detail_bytes, 'd'));
  return c;
}

RunRecord run_record(int cases, std::size_t detail_bytes = 0) {
  RunRecord r;
  r.command = "qualify";
  r.kernel = "f32_textbook";
  r.input_format = r.output_format = "float32";
  for (int i = 0; i < cases; ++i) r.cases.push_back(case_record("case_" + std::to_string(i), detail_bytes));
  return r;
}

// ---- JSON the fuzzer found -------------------------------------------------

TEST(QualifyUntrusted, RecordNumbersBeyondDoubleAreInputErrors) {
  // nlohmann's out_of_range "number overflow" (1e400) used to escape
  // read_run_record and the journal as an exception that is not InputError.
  TempDir tmp;
  const fs::path file = tmp.path() / "record.json";
  std::string text = to_json(run_record(1)).dump(1);
  const std::string seed = "\"seed\": 0";
  ASSERT_NE(text.find(seed), std::string::npos);
  text.replace(text.find(seed), seed.size(), "\"seed\": 1e400");
  write_text(file, text);
  try {
    read_run_record(file);
    ADD_FAILURE() << "1e400 was accepted";
  } catch (const InputError& e) {
    EXPECT_EQ(e.file(), file.string());
    EXPECT_TRUE(contains(e.problem(), "1e400")) << e.what();
  }
}

TEST(QualifyUntrusted, JournalLineWithANumberBeyondDouble) {
  TempDir tmp;
  const fs::path file = tmp.path() / "journal.jsonl";
  const std::string head = nlohmann::json{{"journal", "run"}}.dump() + "\n";
  const std::string good = to_json(case_record("a")).dump() + "\n";
  const std::string bad = "{\"name\": \"b\", \"seed\": 1e400}\n";
  // A bad line before the last is damage: refused.
  write_text(file, head + bad + good);
  EXPECT_THROW(Journal(file, "run", true), InputError);
  // As the last line it may be a torn write: dropped, the rest kept.
  write_text(file, head + good + bad.substr(0, bad.size() - 1));
  Journal j(file, "run", true);
  EXPECT_EQ(j.size(), 1u);
  EXPECT_NE(j.find("a"), nullptr);
}

// ---- a full disk -------------------------------------------------------------

constexpr std::uint64_t kLimit = 8192;

TEST(QualifyFullDisk, WriteRunRecordFailsClearlyAndKeepsThePreviousRecord) {
  TempDir tmp;
  const fs::path file = tmp.path() / "result.json";
  write_run_record(run_record(1), file);
  const std::string previous = read_text(file);
  const ChildOutcome o = with_file_size_limit(kLimit, [&] { write_run_record(run_record(40, 500), file); });
  EXPECT_EQ(o.kind, "InputError") << o.message;
  EXPECT_TRUE(contains(o.message, file.string()) && contains(o.message, "File too large")) << o.message;
  EXPECT_EQ(read_text(file), previous);
  EXPECT_EQ(listing(tmp.path()), std::set<std::string>{"result.json"});
  EXPECT_EQ(read_run_record(file).cases.size(), 1u);
}

TEST(QualifyFullDisk, JournalOnDevFullIsAClearError) {
  // /dev/full: every write fails with ENOSPC (null(4)). Opening it afresh
  // writes the identity line, which must not fail silently.
  try {
    Journal j("/dev/full", "run", false);
    ADD_FAILURE() << "a journal on /dev/full was opened without complaint";
  } catch (const InputError& e) {
    EXPECT_EQ(e.file(), "/dev/full");
    EXPECT_TRUE(contains(e.problem(), "No space left on device")) << e.what();
  }
}

TEST(QualifyFullDisk, JournalAppendOnAFullDiskIsAClearError) {
  TempDir tmp;
  const fs::path file = tmp.path() / "journal.jsonl";
  const ChildOutcome o = with_file_size_limit(kLimit, [&] {
    Journal j(file, "run", false);
    j.append(case_record("small"));
    j.append(case_record("big", 20000));
  });
  EXPECT_EQ(o.kind, "InputError") << o.message;
  EXPECT_TRUE(contains(o.message, "File too large")) << o.message;
  // What was appended before the disk filled is still there for --resume.
  Journal j(file, "run", true);
  EXPECT_NE(j.find("small"), nullptr);
  EXPECT_EQ(j.find("big"), nullptr);
}

TEST(QualifyFullDisk, ResumingOnAFullDiskLosesNoJournalledCase) {
  TempDir tmp;
  const fs::path file = tmp.path() / "journal.jsonl";
  {
    Journal j(file, "run", false);
    for (int i = 0; i < 30; ++i) j.append(case_record("case_" + std::to_string(i), 300));
  }
  // A torn last line makes resume rewrite the journal without it.
  { std::ofstream(file, std::ios::app) << "{\"name\": \"torn"; }
  const std::string before = read_text(file);
  ASSERT_GT(before.size(), kLimit);
  const ChildOutcome o = with_file_size_limit(kLimit, [&] { Journal j(file, "run", true); });
  EXPECT_EQ(o.kind, "InputError") << o.message;
  EXPECT_EQ(read_text(file), before) << "the rewrite cut the journal short";
  Journal j(file, "run", true);
  EXPECT_EQ(j.size(), 30u);
}

// ---- folder names from case names --------------------------------------------

bool safe_component(const std::string& s) {
  if (s.empty() || s == "." || s == "..") return false;
  for (char ch : s) {
    const bool ok = (ch >= 'a' && ch <= 'z') || (ch >= 'A' && ch <= 'Z') || (ch >= '0' && ch <= '9') || ch == '.' ||
                    ch == '_' || ch == '-';
    if (!ok) return false;
  }
  return true;
}

TEST(QualifyUntrusted, FolderNamesFromHostileCaseNamesStayInside) {
  const std::string names[] = {"../../x", "..", ".", "...", "", "/", "/etc/passwd", "a/../../b", "$(reboot)", "x\ny",
                               std::string("nul\0byte", 8), "caf\xc3\xa9", "C:\\windows"};
  for (const std::string& name : names) {
    const std::string folder = case_folder_name(name);
    EXPECT_TRUE(safe_component(folder)) << "\"" << name << "\" -> \"" << folder << "\"";
    // As a path below a save folder it names a child of that folder.
    const fs::path base = "/save";
    EXPECT_EQ((base / folder).lexically_normal().parent_path(), base) << folder;
  }
  // Names that are already safe are kept as they are, so saved folders are recognisable.
  EXPECT_EQ(case_folder_name("gauss_s8_t16.v2-1"), "gauss_s8_t16.v2-1");
}

RC_GTEST_PROP(QualifyUntrusted, FolderNameOfAnyStringIsOneSafeComponent, (const std::string& name)) {
  const std::string folder = case_folder_name(name);
  RC_ASSERT(safe_component(folder));
  RC_ASSERT(folder.size() <= name.size() + 4);
}

}  // namespace
}  // namespace headroom
