// headroom fuzzing — the journal as `--resume` reads it, from its first byte (identity line included).
//
// The bytes are the whole journal file; it is resumed as the run "fuzz"
// (identity line {"journal": "fuzz"}). An InputError is the normal outcome;
// anything else is a finding: a crash, a sanitizer report, a leak, another
// exception. A journal that is accepted must then behave as one: a finished
// case appended to it is found again on a second resume, with every case of
// the first resume still there. That fails if a torn or empty last line were
// kept, so that the appended case landed on a damaged line.
#include <cstddef>
#include <cstdint>
#include <cstdlib>
#include <filesystem>
#include <fstream>
#include <string>
#include <string_view>

#include "fuzz_scratch.h"
#include "headroom/input_error.h"
#include "headroom/journal.h"
#include "headroom/record.h"

namespace {

namespace fs = std::filesystem;

using headroom::fuzzing::check;

const fs::path& root() { return headroom::fuzzing::scratch_dir("fuzz-journal"); }

// A finished case as the runner journals it (the fields a record needs).
headroom::CaseRecord appended_case() {
  headroom::CaseRecord c;
  c.name = "fuzz-appended-case";
  c.family = "gaussian";
  c.level = "core";
  c.shape = "1,1,1,2,2,4,4";
  c.kv_len = 2;
  c.mask = "none";
  c.format = "float32";
  c.within_budget = true;
  return c;
}

}  // namespace

extern "C" int LLVMFuzzerTestOneInput(const std::uint8_t* data, std::size_t size) {
  const fs::path file = root() / "journal.jsonl";
  {
    std::ofstream out(file, std::ios::binary | std::ios::trunc);
    out.write(reinterpret_cast<const char*>(data), static_cast<std::streamsize>(size));
    check(static_cast<bool>(out));
  }
  std::size_t cases = 0;
  bool had_appended = false;
  try {
    headroom::Journal journal(file, "fuzz", true);
    cases = journal.size();
    check(cases <= size);
    had_appended = journal.find(appended_case().name) != nullptr;
    if (!had_appended) journal.append(appended_case());
  } catch (const headroom::InputError&) {
    return 0;
  }
  // Accepted: resuming again sees every case plus the appended one.
  try {
    headroom::Journal again(file, "fuzz", true);
    check(again.size() == cases + (had_appended ? 0 : 1));
    check(again.find(appended_case().name) != nullptr);
  } catch (const headroom::InputError&) {
    check(false);
  }
  return 0;
}
