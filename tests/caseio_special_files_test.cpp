// headroom tests — every reader of a user's file refuses a device, a FIFO and a
// directory at once (exit 2, a message naming the file), and a case folder's
// tensors cannot leave the folder through a symbolic or hard link.
//
// Each check runs the command line under `timeout` (the path a user takes): a
// reader that blocked on a FIFO or read /dev/zero without end would show as
// exit 124 within seconds instead of hanging the suite.
#include <gtest/gtest.h>
#include <sys/stat.h>
#include <sys/wait.h>
#include <unistd.h>

#include <algorithm>
#include <cstdlib>
#include <filesystem>
#include <fstream>
#include <sstream>
#include <string>
#include <vector>

namespace headroom {
namespace {

namespace fs = std::filesystem;

const std::string kTool = std::string(HEADROOM_BINARY_DIR) + "/tools/headroom";
const std::string kSource = HEADROOM_SOURCE_DIR;
const std::string kCase = kSource + "/corpora/oob_write_row/attention_sink-s15-z42-1x1x1x1x1x1x1-none-p0.0.0.0.0.0.0.0";

struct Outcome {
  int code = -1;     // exit status; 124 when `timeout` had to end it
  std::string err;   // its stderr
};

class SpecialFiles : public ::testing::Test {
 protected:
  void SetUp() override {
    dir_ = fs::temp_directory_path() / ("headroom_special_" + std::to_string(::getpid()) + "_" +
                                        ::testing::UnitTest::GetInstance()->current_test_info()->name());
    fs::remove_all(dir_);
    fs::create_directories(dir_ / "a_directory");
    ASSERT_EQ(::mkfifo((dir_ / "a_fifo").c_str(), 0600), 0);
  }
  void TearDown() override { fs::remove_all(dir_); }

  // The special files every reader is given: a device, a FIFO nobody writes, a directory.
  std::vector<std::string> specials() const {
    return {"/dev/zero", (dir_ / "a_fifo").string(), (dir_ / "a_directory").string()};
  }

  Outcome run(const std::string& args) const {
    const fs::path err = dir_ / "stderr";
    const std::string cmd = "timeout 20 " + kTool + " " + args + " >/dev/null 2>" + err.string() + " </dev/null";
    const int status = std::system(cmd.c_str());
    Outcome o;
    o.code = WIFEXITED(status) ? WEXITSTATUS(status) : -1;
    std::ifstream in(err);
    std::stringstream s;
    s << in.rdbuf();
    o.err = s.str();
    return o;
  }

  // The reader given `file` through `args` (with {} standing for it, if it is
  // not inside a folder given there) says exit 2, names it, and why.
  void expect_refused(const std::string& args_with_file, const std::string& file, const std::string& why) const {
    std::string args = args_with_file;
    if (const auto at = args.find("{}"); at != std::string::npos) args.replace(at, 2, file);
    const Outcome o = run(args);
    EXPECT_EQ(o.code, 2) << args << "\n" << o.err;
    EXPECT_NE(o.err.find(file + ": "), std::string::npos) << args << "\n" << o.err;
    EXPECT_NE(o.err.find(why), std::string::npos) << args << "\n" << o.err;
    EXPECT_EQ(std::count(o.err.begin(), o.err.end(), '\n'), 1) << "one line: " << o.err;
  }

  // A copy of a shipped case folder, to be spoiled.
  fs::path copy_case() const {
    const fs::path c = dir_ / "case";
    fs::remove_all(c);
    fs::copy(kCase, c);
    return c;
  }

  fs::path dir_;
};

TEST_F(SpecialFiles, BudgetFile) {
  for (const auto& f : specials())
    expect_refused("qualify --kernel f32_textbook --suite quick --budget {} --json " + (dir_ / "r.json").string(), f,
                   "not a regular file");
}

TEST_F(SpecialFiles, RecordsGivenToCompareAndMerge) {
  for (const auto& f : specials()) {
    expect_refused("compare {} " + (dir_ / "other.json").string(), f, "not a regular file");
    expect_refused("merge {} --json " + (dir_ / "m.json").string(), f, "not a regular file");
  }
  EXPECT_FALSE(fs::exists(dir_ / "m.json"));
}

TEST_F(SpecialFiles, ModelShapesFile) {
  for (const auto& f : specials())
    expect_refused("qualify --kernel f32_textbook --shapes {} --json " + (dir_ / "r.json").string(), f,
                   "not a regular file");
}

TEST_F(SpecialFiles, JournalResumedOrWritten) {
  for (const auto& f : specials()) {
    // A folder is refused with the other output paths, before the run starts (run_common.cpp).
    const std::string why = fs::is_directory(f) ? "is a folder" : "not a regular file";
    expect_refused("qualify --kernel f32_textbook --suite quick --resume --journal {} --json " + (dir_ / "r.json").string(),
                   f, why);
    if (f == "/dev/zero") continue;  // written to, a device is the user's choice (/dev/full tests a full disk)
    expect_refused("qualify --kernel f32_textbook --suite quick --journal {} --json " + (dir_ / "r.json").string(), f,
                   why);
  }
}

TEST_F(SpecialFiles, CaseManifest) {
  const std::string replay = "replay --kernel f32_textbook --no-isolation " + (dir_ / "case").string() + " --json " +
                             (dir_ / "r.json").string();
  for (const auto& f : specials()) {
    const fs::path c = copy_case();
    fs::remove(c / "manifest.json");
    if (f == "/dev/zero") {
      fs::create_symlink(f, c / "manifest.json");
      expect_refused(replay, (c / "manifest.json").string(), "symbolic link");
    } else {
      fs::rename(f, c / "manifest.json");
      expect_refused(replay, (c / "manifest.json").string(), "not a regular file");
      fs::rename(c / "manifest.json", f);
    }
  }
}

TEST_F(SpecialFiles, CaseTensors) {
  const std::string replay = "replay --kernel f32_textbook --no-isolation " + (dir_ / "case").string() + " --json " +
                             (dir_ / "r.json").string();
  const std::string q = (dir_ / "case" / "q.npy").string();
  // Unspoiled, the copy replays (exit 0 or 1: the kernel's verdict, not a refusal).
  copy_case();
  const Outcome good = run(replay);
  EXPECT_TRUE(good.code == 0 || good.code == 1) << good.err;

  fs::path c = copy_case();
  fs::remove(c / "q.npy");
  fs::rename(dir_ / "a_fifo", c / "q.npy");
  expect_refused(replay, q, "FIFO");

  c = copy_case();
  fs::remove(c / "q.npy");
  fs::create_directory(c / "q.npy");
  expect_refused(replay, q, "directory");

  // A link to a valid tensor outside the folder: followed, it would read a file the folder does not hold.
  fs::copy_file(kCase + "/q.npy", dir_ / "outside.npy");
  c = copy_case();
  fs::remove(c / "q.npy");
  fs::create_symlink(dir_ / "outside.npy", c / "q.npy");
  expect_refused(replay, q, "symbolic link");

  c = copy_case();
  fs::remove(c / "q.npy");
  fs::create_hard_link(dir_ / "outside.npy", c / "q.npy");
  expect_refused(replay, q, "hard links");

  c = copy_case();
  fs::remove(c / "q.npy");
  fs::create_symlink("/dev/zero", c / "q.npy");
  expect_refused(replay, q, "symbolic link");
}

}  // namespace
}  // namespace headroom
