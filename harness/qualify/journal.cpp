// headroom — the journal of finished cases (journal.h).
#include "headroom/journal.h"

#include <sys/stat.h>
#include <unistd.h>

#include <algorithm>
#include <cerrno>
#include <cstring>
#include <vector>

#include "headroom/atomic_file.h"
#include "headroom/input_error.h"
#include "headroom/input_file.h"
#include "headroom/json_input.h"

namespace headroom {
namespace {

// The journal's lines as std::getline would split them: on '\n', with no
// empty last line for a file that ends in one. `text` receives the whole file.
std::vector<std::string> read_lines(const std::filesystem::path& path, std::string& text) {
  static constexpr InputKind kJournalFile{"journal", kRecordFile.max_bytes,
                                          "give the journal of a headroom run, or remove it to start afresh"};
  text = read_input_file(path, kJournalFile);
  std::vector<std::string> lines;
  for (std::size_t start = 0; start < text.size();) {
    const std::size_t end = std::min(text.find('\n', start), text.size());
    lines.push_back(text.substr(start, end - start));
    start = end + 1;
  }
  return lines;
}

// A journal is appended to as a run goes: opening a FIFO for writing would
// block the run until a reader came, and a directory or socket cannot be
// written. (A device such as /dev/null or /dev/full is the user's choice.)
void check_writable_target(const std::filesystem::path& path) {
  struct stat st {};
  if (::stat(path.c_str(), &st) == 0 && (S_ISFIFO(st.st_mode) || S_ISDIR(st.st_mode) || S_ISSOCK(st.st_mode)))
    throw InputError(path.string(), "file",
                     std::string("is ") + (S_ISFIFO(st.st_mode) ? "a FIFO (named pipe)" : S_ISDIR(st.st_mode) ? "a directory" : "a socket") +
                         ", not a regular file: a journal is a file headroom appends to",
                     "give a path for a new journal, or of a journal headroom wrote");
}

}  // namespace

Journal::Journal(std::filesystem::path path, const std::string& identity, bool resume) : path_(std::move(path)) {
  const std::string file = path_.string();
  const nlohmann::json id_line = {{"journal", identity}};
  bool fresh = true;
  if (resume && std::filesystem::exists(path_)) {
    std::string text;
    const auto lines = read_lines(path_, text);
    if (!lines.empty()) {
      fresh = false;
      const nlohmann::json head = parse_json_input(lines[0], file, "remove the journal to start afresh", 1);
      if (head != id_line)
        throw InputError(file, "line 1", "belongs to another run (" + quote_input(head.dump()) + ")",
                         "resume with the same command and options, or remove the journal to start afresh");
      std::string kept = lines[0] + '\n';
      for (std::size_t i = 1; i < lines.size(); ++i) {
        const std::string place = "line " + std::to_string(i + 1);
        nlohmann::json line;
        try {
          line = parse_json_input(lines[i], file, "remove the journal to start afresh", i + 1);
        } catch (const InputError&) {
          // Only the last line can be a write cut short by a kill; anything else is damage.
          if (i + 1 == lines.size()) continue;
          throw;
        }
        auto c = case_record_from_json(line, file, place);
        if (done_.count(c.name))
          throw InputError(file, place + " field \"name\"", "case " + quote_input(c.name) + " is journalled twice",
                           "remove the journal to start afresh");
        done_[c.name] = std::move(c);
        kept += lines[i] + '\n';
      }
      // Appends must start on a clean line. A kill can cut the last write
      // anywhere: inside the line (dropped above), or just before its '\n',
      // which leaves a whole case that the next append would be glued to, and
      // the journal unreadable past it. So the file is rewritten as the lines
      // kept, each ended; atomically, so a full disk cannot cost the cases
      // already journalled.
      if (kept != text) write_file_atomically(path_, kept);
    }
  }
  check_writable_target(path_);
  file_ = std::fopen(file.c_str(), fresh ? "w" : "a");
  if (!file_)
    throw InputError(file, "file", std::string("cannot be opened for writing: ") + std::strerror(errno),
                     "choose a writable folder for the journal");
  if (fresh && (std::fputs((id_line.dump() + "\n").c_str(), file_) < 0 || std::fflush(file_) != 0)) {
    const std::string reason = std::strerror(errno);
    std::fclose(file_);
    file_ = nullptr;
    throw InputError(file, "line 1", "cannot write the journal's identity line: " + reason,
                     "free disk space or choose another folder for the journal");
  }
}

Journal::~Journal() {
  if (file_) std::fclose(file_);
}

const CaseRecord* Journal::find(const std::string& name) const {
  auto it = done_.find(name);
  return it == done_.end() ? nullptr : &it->second;
}

void Journal::append(const CaseRecord& c) {
  const std::string line = to_json(c).dump() + "\n";
  if (std::fputs(line.c_str(), file_) < 0 || std::fflush(file_) != 0 || ::fsync(::fileno(file_)) != 0)
    throw InputError(path_.string(), "append", std::string("write failed: ") + std::strerror(errno),
                     "free disk space, then resume with --resume");
  done_[c.name] = c;
}

}  // namespace headroom
