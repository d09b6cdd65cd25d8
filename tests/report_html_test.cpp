// Tests of the HTML report (html_report.h) in a real browser: Debian's
// chromium, headless, loads the file, runs its inline script, and we read the
// DOM it leaves (--dump-dom) and a screenshot (--screenshot). CI installs
// chromium (.ci/packages.txt); without it these tests fail, saying so.
#include <gtest/gtest.h>
#include <unistd.h>

#include <cmath>
#include <cstdio>
#include <cstdlib>
#include <filesystem>
#include <fstream>
#include <regex>
#include <sstream>

#include "headroom/html_report.h"
#include "report_records.h"

namespace headroom {
namespace {

namespace fs = std::filesystem;
using testing::make_case;
using testing::make_record;

std::string read_file(const fs::path& p) {
  std::ifstream in(p, std::ios::binary);
  std::stringstream s;
  s << in.rdbuf();
  return s.str();
}

std::string find_chromium() {
  for (const char* p : {"/usr/bin/chromium", "/usr/bin/chromium-browser"})
    if (::access(p, X_OK) == 0) return p;
  return "";
}

// Runs chromium headless on `page` with `mode` ("--dump-dom" or
// "--screenshot=FILE --window-size=W,H"), in a fresh profile folder, with
// everything that would reach the network turned off. Returns its stdout.
std::string run_chromium(const fs::path& page, const std::string& mode, const fs::path& work) {
  const std::string chromium = find_chromium();
  const fs::path profile = work / ("profile-" + std::to_string(std::rand()));
  fs::create_directories(profile);
  const fs::path out = work / "chromium.out";
  const std::string cmd = "timeout 120 " + chromium +
                          " --headless --no-sandbox --disable-gpu --disable-quic --no-first-run"
                          " --disable-background-networking --disable-component-update --disable-sync"
                          " --user-data-dir=" + profile.string() + " " + mode + " file://" + page.string() + " > " +
                          out.string() + " 2> " + (work / "chromium.err").string();
  const int rc = std::system(cmd.c_str());
  EXPECT_EQ(rc, 0) << cmd << "\n" << read_file(work / "chromium.err");
  return read_file(out);
}

// Returns: the markup of <svg id="ID"> ... </svg> in `dom`, or "".
std::string svg_of(const std::string& dom, const std::string& id) {
  const auto start = dom.find("<svg id=\"" + id + "\"");
  if (start == std::string::npos) return "";
  const auto end = dom.find("</svg>", start);
  return end == std::string::npos ? "" : dom.substr(start, end - start);
}

std::size_t count(const std::string& text, const std::string& what) {
  std::size_t n = 0;
  for (auto p = text.find(what); p != std::string::npos; p = text.find(what, p + 1)) ++n;
  return n;
}

// Twelve cases across three families: one with no finite scaled error (not
// plotted), faults of two classes in two families, a histogram with five
// non-empty buckets in total.
RunRecord sample() {
  std::vector<CaseRecord> cases;
  const char* families[] = {"gaussian", "long_sequence", "large_logits"};
  for (int i = 0; i < 12; ++i) {
    const std::int64_t tk = 4 << (i % 9);
    CaseRecord c = make_case("case-" + std::to_string(10 + i), families[i % 3], 0.25 * (1 + i * i), i % 5, i % 4 != 0, tk,
                             std::ldexp(1.0, i - 2));
    c.shape = "1,4,2,8," + std::to_string(tk) + ",16,16";
    cases.push_back(c);
  }
  cases[5].figures.max_scaled_error = INFINITY;  // a non-finite figure: not plotted
  cases[0].ulp_histogram[7] = 1;                 // buckets 0, 2, 3 everywhere, 7 and 20 once
  cases[1].ulp_histogram[20] = 3;
  cases[1].faults["mask_leak"] = 2;
  cases[4].faults["mask_leak"] = 1;              // family long_sequence too
  cases[4].faults["non_finite"] = 4;
  cases[7].faults["non_finite"] = 1;             // long_sequence again: still one mark per (family, class)
  cases[2].name = "case </script><b>evil</b> & 'quote'";  // must not break the page or its data
  RunRecord r = make_record(cases);
  r.skipped = {"masks-s1-dense: kernel declares no dense mask"};
  return r;
}

class HtmlReport : public ::testing::Test {
 protected:
  void SetUp() override {
    ASSERT_FALSE(find_chromium().empty())
        << "chromium is not installed: the HTML report cannot be checked in a browser. Install Debian's chromium "
           "(apt-get install -y chromium; CI does so from .ci/packages.txt).";
    work_ = fs::temp_directory_path() / ("headroom_report_html_" + std::to_string(::getpid()));
    fs::remove_all(work_);
    fs::create_directories(work_);
    page_ = work_ / "report.html";
    std::ofstream(page_) << html_report(sample());
  }
  void TearDown() override {
    if (!::testing::Test::HasFailure()) fs::remove_all(work_);
  }
  fs::path work_, page_;
};

TEST_F(HtmlReport, IsSelfContained) {
  const std::string html = read_file(page_);
  // No external scripts, styles, fonts or images: nothing with a src or href
  // but in-page anchors, and a policy that forbids any fetch.
  EXPECT_EQ(html.find(" src="), std::string::npos);
  EXPECT_EQ(html.find("<link"), std::string::npos);
  EXPECT_EQ(html.find("http://"), html.find("http://www.w3.org/2000/svg"));  // only the SVG namespace name
  EXPECT_EQ(html.find("https://"), std::string::npos);
  EXPECT_NE(html.find("default-src 'none'"), std::string::npos);
  // The hostile case name is escaped in the markup and in the embedded JSON.
  EXPECT_EQ(html.find("</script><b>"), std::string::npos);
  EXPECT_EQ(count(html, "</script>"), 2u);
}

TEST_F(HtmlReport, ScriptDrawsFourPlotsWithOneMarkPerDatum) {
  const std::string dom = run_chromium(page_, "--dump-dom", work_);
  ASSERT_NE(dom.find("data-plots=\"drawn\""), std::string::npos) << "the plot script did not finish:\n"
                                                                  << dom.substr(0, 2000);
  const std::string kv = svg_of(dom, "plot-kv-len"), logit = svg_of(dom, "plot-logit-scale");
  const std::string hist = svg_of(dom, "plot-ulp-histogram"), faults = svg_of(dom, "plot-faults");
  ASSERT_FALSE(kv.empty());
  ASSERT_FALSE(logit.empty());
  ASSERT_FALSE(hist.empty());
  ASSERT_FALSE(faults.empty());
  // 12 cases, one without a finite scaled error.
  EXPECT_EQ(count(kv, "<circle"), 11u);
  EXPECT_EQ(count(logit, "<circle"), 11u);
  EXPECT_EQ(count(kv, "class=\"mark fail\""), 3u);  // cases 0, 4, 8 fail (i % 4 == 0); case 5 (inf) passes
  // Each plotted case's scaled-error limit is drawn beside it.
  EXPECT_EQ(count(kv, "class=\"limit\""), 11u);
  EXPECT_EQ(count(logit, "class=\"limit\""), 11u);
  EXPECT_NE(dom.find("Smallest margin"), std::string::npos);
  // Non-empty buckets: 0, 2, 3 (every case), 7 and 20 (once each).
  EXPECT_EQ(count(hist, "class=\"mark bar\""), 5u);
  // (family, class) pairs with a count: cases 1, 4 and 7 are all long_sequence (i % 3 == 1), with
  // mask_leak and non_finite: two stacked marks, however many cases feed them.
  EXPECT_EQ(count(faults, "class=\"mark fault-"), 2u);
  // Three family rows labelled.
  for (const char* f : {"gaussian", "long_sequence", "large_logits"}) EXPECT_NE(faults.find(f), std::string::npos);
  // The totals the script wrote in the captions.
  EXPECT_NE(dom.find("11 cases plotted; 1 without a finite figure not plotted"), std::string::npos);
  EXPECT_NE(dom.find("8 faults over 3 families."), std::string::npos);
}

// Reads width and height from a PNG's IHDR chunk (PNG spec, 2nd ed., §11.2.2).
bool png_size(const std::string& png, std::uint32_t& w, std::uint32_t& h) {
  if (png.size() < 24 || png.compare(0, 8, "\x89PNG\r\n\x1a\n") != 0 || png.compare(12, 4, "IHDR") != 0) return false;
  auto be32 = [&](std::size_t at) {
    return (std::uint32_t(std::uint8_t(png[at])) << 24) | (std::uint32_t(std::uint8_t(png[at + 1])) << 16) |
           (std::uint32_t(std::uint8_t(png[at + 2])) << 8) | std::uint32_t(std::uint8_t(png[at + 3]));
  };
  w = be32(16);
  h = be32(20);
  return true;
}

TEST_F(HtmlReport, ScreenshotIsNonTrivial) {
  const fs::path shot = work_ / "report.png";
  run_chromium(page_, "--screenshot=" + shot.string() + " --window-size=1400,2200 --hide-scrollbars", work_);
  ASSERT_TRUE(fs::exists(shot)) << "no screenshot written";
  const std::string png = read_file(shot);
  std::uint32_t w = 0, h = 0;
  ASSERT_TRUE(png_size(png, w, h)) << "not a PNG";
  EXPECT_EQ(w, 1400u);
  EXPECT_EQ(h, 2200u);
  // A blank 1400×2200 page compresses to a few kilobytes; text, tables and
  // four plots take far more (about 200 kB here).
  EXPECT_GT(png.size(), 60000u) << "the screenshot looks empty";
  if (const char* keep = std::getenv("HEADROOM_KEEP_SCREENSHOT")) fs::copy_file(shot, keep, fs::copy_options::overwrite_existing);
}

}  // namespace
}  // namespace headroom
