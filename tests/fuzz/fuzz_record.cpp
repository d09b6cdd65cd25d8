// headroom fuzzing — the result-record readers on arbitrary bytes: read_run_record and the journal.
//
// The bytes are written to a file and read as a run record (read_run_record),
// then as the body of a journal after a valid identity line (Journal with
// resume). An InputError is the normal outcome; anything else is a finding:
// a crash, a sanitizer report, a leak, another exception (a nlohmann::json
// type_error escaping, say), or an accepted record that does not survive
// to_json → run_record_from_json unchanged.
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

const fs::path& root() { return headroom::fuzzing::scratch_dir("fuzz-record"); }

void write(const fs::path& p, std::string_view a, std::string_view b = {}) {
  std::ofstream out(p, std::ios::binary | std::ios::trunc);
  out.write(a.data(), static_cast<std::streamsize>(a.size()));
  out.write(b.data(), static_cast<std::streamsize>(b.size()));
  check(static_cast<bool>(out));
}

}  // namespace

extern "C" int LLVMFuzzerTestOneInput(const std::uint8_t* data, std::size_t size) {
  const std::string_view text(reinterpret_cast<const char*>(data), size);
  const fs::path record_file = root() / "record.json";
  write(record_file, text);
  try {
    const headroom::RunRecord r = headroom::read_run_record(record_file);
    // An accepted record is one headroom could have written: its JSON form reads back to the same JSON.
    const nlohmann::json j = headroom::to_json(r);
    check(headroom::to_json(headroom::run_record_from_json(j, "fuzz-rewritten.json")) == j);
  } catch (const headroom::InputError&) {
  }

  // The same bytes as the case lines of a journal being resumed.
  const std::string identity = "fuzz";
  const std::string head = nlohmann::json{{"journal", identity}}.dump() + "\n";
  const fs::path journal_file = root() / "journal.jsonl";
  write(journal_file, head, text);
  try {
    headroom::Journal journal(journal_file, identity, true);
    check(journal.size() <= size);
  } catch (const headroom::InputError&) {
  }
  return 0;
}
