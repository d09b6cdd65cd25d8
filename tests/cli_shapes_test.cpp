// Production shapes end to end: test-only kernels with a defect only at Dk = 256,
// only past Tk = 4096 and only at group size 8 pass `quick`, are caught by
// `standard` (one of standard's own cases at each trigger, to keep CI fast) and through `--shapes`
// naming the triggering shape; a declaration omitting a head dim gets those
// cases skipped and counted; README's coverage table is `headroom suites`.
#include <gtest/gtest.h>

#include <sys/wait.h>
#include <unistd.h>

#include <cstdlib>
#include <filesystem>
#include <fstream>
#include <functional>
#include <optional>
#include <sstream>
#include <string>

#include "headroom/generate.h"
#include "headroom/record.h"
#include "headroom/run_summary.h"
#include "headroom/suite.h"

namespace headroom {
namespace {

namespace fs = std::filesystem;

const std::string kTool = std::string(HEADROOM_BINARY_DIR) + "/tools/headroom";
const std::string kPlugins = HEADROOM_SHAPE_DEFECT_DIR;

std::string plugin(int defect) { return kPlugins + "/libshape_defect_" + std::to_string(defect) + ".so"; }

fs::path fresh_dir(const std::string& name) {
  fs::path d = fs::temp_directory_path() / ("headroom_shapes_test_" + name + "_" + std::to_string(::getpid()));
  fs::remove_all(d);
  fs::create_directories(d);
  return d;
}

std::string slurp(const fs::path& p) {
  std::ifstream in(p);
  std::stringstream s;
  s << in.rdbuf();
  return s.str();
}

// Runs headroom with `args`; stdout and stderr go to dir/out.txt. Returns the exit code.
int run(const fs::path& dir, const std::string& args) {
  const int status = std::system((kTool + " " + args + " >" + (dir / "out.txt").string() + " 2>&1").c_str());
  return WIFEXITED(status) ? WEXITSTATUS(status) : -1;
}

std::vector<std::int64_t> extents(const CaseRecord& c) {
  const auto s = parse_shape(c.level, c.shape);
  if (!s) return {};
  return {s->batch, s->q_heads, s->kv_heads, s->q_len, s->kv_len, s->key_dim, s->value_dim};
}

// Every failing case of `r` is out of its error budget (not a fault) and has
// the triggering shape; at least one fails.
void expect_caught(const RunRecord& r, const std::function<bool(const std::vector<std::int64_t>&)>& trigger,
                   const std::string& what) {
  std::size_t failing = 0;
  for (const auto& c : r.cases) {
    if (c.within_budget) continue;
    ++failing;
    const auto e = extents(c);
    ASSERT_EQ(e.size(), 7u) << c.shape;
    EXPECT_TRUE(trigger(e)) << what << ": " << c.name << " failed without the triggering shape";
    EXPECT_TRUE(c.faults.empty()) << c.name << " should be an error-budget failure, not a fault";
    EXPECT_FALSE(c.reasons.empty()) << c.name;
  }
  EXPECT_GT(failing, 0u) << what << " was not caught";
}

bool dk256(const std::vector<std::int64_t>& e) { return e[5] == 256; }
bool past4096(const std::vector<std::int64_t>& e) { return e[4] > 4096; }
// With one kv head, h mod Hkv and h / 8 agree: the wrong mapping shows only past one kv head.
bool group8(const std::vector<std::int64_t>& e) { return e[1] / e[2] == 8 && e[2] > 1; }

TEST(CliShapes, EachShapeDefectPassesQuick) {
  const auto dir = fresh_dir("quick");
  for (int defect : {1, 2, 3})
    EXPECT_EQ(run(dir, "qualify --suite quick --quiet --kernel " + plugin(defect)), 0) << "defect " << defect << ": "
                                                                                          << slurp(dir / "out.txt");
}

// `standard` reaches each trigger: its own cases are listed from the suite's
// outlines (no values made, the list `qualify --suite standard` runs), and the
// cheapest of them with every key visible is made with `case make`
// (the command a report prints for a failing case) and judged with `replay`.
// Judging all of standard's cases at every trigger took ~290 s; one case each
// proves the same path in seconds.
TEST(CliShapes, StandardCatchesEachShapeDefect) {
  const auto dir = fresh_dir("standard");
  const auto standard = suite_requests("standard");
  const auto quick = suite_requests("quick");
  struct Probe {
    int defect;
    bool (*trigger)(const std::vector<std::int64_t>&);
  };
  for (const Probe& p : {Probe{1, dk256}, Probe{2, past4096}, Probe{3, group8}}) {
    const std::string what = "defect " + std::to_string(p.defect);
    for (const auto& r : quick) {
      const CaseOutline o = case_outline(r);
      const auto& s = o.shape;
      EXPECT_FALSE(p.trigger({s.batch, s.q_heads, s.kv_heads, s.q_len, s.kv_len, s.key_dim, s.value_dim}))
          << what << ": quick reaches the trigger with " << o.name;
    }
    // Every key visible to the last query row (no padding, no top-left causal cut), so the trigger is live.
    std::optional<CaseRequest> cheapest;
    std::int64_t cheapest_cost = 0;
    std::size_t reaching = 0;
    for (const auto& r : standard) {
      const CaseOutline o = case_outline(r);
      const auto& s = o.shape;
      if (o.level != Level::core || !p.trigger({s.batch, s.q_heads, s.kv_heads, s.q_len, s.kv_len, s.key_dim, s.value_dim}))
        continue;
      ++reaching;
      if (o.mask != MaskKind::none && o.mask != MaskKind::causal_bottom_right) continue;
      const std::int64_t cost = s.batch * s.q_heads * s.q_len * s.kv_len * (s.key_dim + s.value_dim);
      if (!cheapest || cost < cheapest_cost) cheapest = r, cheapest_cost = cost;
    }
    EXPECT_GE(reaching, 3u) << what << ": standard hardly reaches the trigger";
    ASSERT_TRUE(cheapest) << what << ": no standard case with every key visible reaches the trigger";
    const fs::path folder = dir / ("d" + std::to_string(p.defect));
    const std::string make = case_command(*cheapest, folder.string(), kTool);
    ASSERT_EQ(make.rfind(kTool + " ", 0), 0u) << make;
    ASSERT_EQ(run(dir, make.substr(kTool.size() + 1)), 0) << slurp(dir / "out.txt");
    const fs::path json = dir / ("d" + std::to_string(p.defect) + ".json");
    EXPECT_EQ(run(dir, "replay --quiet --kernel " + plugin(p.defect) + " --json " + json.string() + " " + folder.string()),
              1)
        << slurp(dir / "out.txt");
    const RunRecord rec = read_run_record(json);
    ASSERT_EQ(rec.cases.size(), 1u);
    EXPECT_EQ(rec.cases[0].name, case_outline(*cheapest).name) << "the replayed case is not standard's";
    expect_caught(rec, p.trigger, what);
  }
}

TEST(CliShapes, ShapesFileNamingTheTriggerCatchesEachDefect) {
  const auto dir = fresh_dir("file");
  struct Probe {
    int defect;
    const char* toml;
    bool (*trigger)(const std::vector<std::int64_t>&);
  };
  const Probe probes[] = {
      {1, "q_heads = 4\nkv_heads = 2\nhead_dim = 256\ncontext_lengths = [300]\n", dk256},
      {2, "q_heads = 2\nkv_heads = 1\nhead_dim = 64\ncontext_lengths = [4100]\n", past4096},
      {3, "q_heads = 16\nkv_heads = 2\nhead_dim = 64\ncontext_lengths = [200]\nquery_lengths = [1, 4]\n", group8},
  };
  for (const Probe& p : probes) {
    const fs::path model = dir / ("model" + std::to_string(p.defect) + ".toml");
    std::ofstream(model) << "# decoder-only model: every layer shares this attention\n[[attention]]\n" << p.toml;
    const fs::path json = dir / ("d" + std::to_string(p.defect) + ".json");
    EXPECT_EQ(run(dir, "qualify --quiet --family gaussian --shapes " + model.string() + " --kernel " + plugin(p.defect) +
                           " --json " + json.string()),
              1)
        << slurp(dir / "out.txt");
    const RunRecord r = read_run_record(json);
    expect_caught(r, p.trigger, "defect " + std::to_string(p.defect) + " via --shapes");
    for (const auto& c : r.cases) EXPECT_TRUE(p.trigger(extents(c))) << c.name << " is not a shape of the file";
  }
}

TEST(CliShapes, UndeclaredHeadDimIsSkippedAndCounted) {
  const auto dir = fresh_dir("declared");
  const fs::path json = dir / "r.json", md = dir / "r.md";
  ASSERT_EQ(run(dir, "qualify --kernel " + plugin(0) +
                         " --family gaussian --shape 1,4,2,4,100,80,80 --shape 1,4,2,4,100,64,64 --json " +
                         json.string() + " --markdown " + md.string()),
            0)
      << slurp(dir / "out.txt");
  const RunRecord r = read_run_record(json);
  EXPECT_EQ(r.cases.size(), 2u);
  ASSERT_EQ(r.skipped.size(), 2u);
  for (const auto& s : r.skipped) EXPECT_NE(s.find("key dim 80 not declared"), std::string::npos) << s;
  const std::string counted = "key dim 80 not declared (64,96,128,192,256): 2 cases";
  EXPECT_NE(slurp(md).find("Skipped 2 of 4 cases"), std::string::npos);
  EXPECT_NE(slurp(md).find(counted), std::string::npos) << slurp(md);
  EXPECT_NE(slurp(dir / "out.txt").find(counted), std::string::npos) << slurp(dir / "out.txt");
}

TEST(CliShapes, MostlySkippedRunSaysSoFirst) {
  const auto dir = fresh_dir("mostly");
  const fs::path md = dir / "r.md";
  ASSERT_EQ(run(dir, "qualify --kernel " + plugin(0) +
                         " --family gaussian --shape 1,4,2,4,100,80,80 --shape 1,2,1,4,50,80,80 --shape 1,4,2,4,100,64,64 "
                         "--markdown " + md.string()),
            0);
  const std::string text = slurp(md);
  const auto first_lines = text.substr(0, text.find("## "));
  EXPECT_NE(first_lines.find("MOST OF THE SUITE WAS SKIPPED"), std::string::npos) << first_lines;
}

TEST(CliShapes, BadShapesFileNamesFileLineAndFix) {
  const auto dir = fresh_dir("bad");
  const fs::path model = dir / "model.toml";
  std::ofstream(model) << "[[attention]]\nq_heads = 32\nkv_heads = 3\nhead_dim = 128\ncontext_lengths = [4096]\n";
  EXPECT_EQ(run(dir, "qualify --kernel f32_textbook --shapes " + model.string()), 2);
  const std::string err = slurp(dir / "out.txt");
  EXPECT_NE(err.find(model.string()), std::string::npos) << err;
  EXPECT_NE(err.find("line 1"), std::string::npos) << err;
  EXPECT_NE(err.find("multiple of kv_heads"), std::string::npos) << err;
  std::ofstream(model) << "[[attention]]\nq_heads = 32\nkv_heads = 8\nhead_dims = 128\ncontext_lengths = [4096]\n";
  EXPECT_EQ(run(dir, "qualify --kernel f32_textbook --shapes " + model.string()), 2);
  EXPECT_NE(slurp(dir / "out.txt").find("line 4"), std::string::npos) << slurp(dir / "out.txt");
  EXPECT_EQ(run(dir, "qualify --kernel f32_textbook --family no_such_family"), 2);
  EXPECT_EQ(run(dir, "qualify --kernel f32_textbook --shape 1,3,2,1,8,8,8"), 2);
}

TEST(CliShapes, ReadmeCoverageTableIsWhatSuitesPrints) {
  const auto dir = fresh_dir("readme");
  ASSERT_EQ(run(dir, "suites --markdown"), 0);
  const std::string table = slurp(dir / "out.txt");
  ASSERT_FALSE(table.empty());
  EXPECT_NE(slurp(std::string(HEADROOM_SOURCE_DIR) + "/README.md").find(table), std::string::npos)
      << "README.md's coverage table differs from `headroom suites --markdown`:\n" << table;
}

}  // namespace
}  // namespace headroom
