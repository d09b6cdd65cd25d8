// headroom — the journal of finished cases (journal.h).
#include "headroom/journal.h"

#include <unistd.h>

#include <cerrno>
#include <cstring>
#include <fstream>
#include <vector>

#include "headroom/atomic_file.h"
#include "headroom/input_error.h"

namespace headroom {
namespace {

std::vector<std::string> read_lines(const std::filesystem::path& path) {
  std::vector<std::string> lines;
  std::ifstream in(path);
  for (std::string line; std::getline(in, line);) lines.push_back(line);
  return lines;
}

}  // namespace

Journal::Journal(std::filesystem::path path, const std::string& identity, bool resume) : path_(std::move(path)) {
  const std::string file = path_.string();
  const nlohmann::json id_line = {{"journal", identity}};
  bool fresh = true;
  if (resume && std::filesystem::exists(path_)) {
    const auto lines = read_lines(path_);
    if (!lines.empty()) {
      fresh = false;
      nlohmann::json head;
      try {
        head = nlohmann::json::parse(lines[0]);
      } catch (const nlohmann::json::exception&) {  // parse_error, or out_of_range for a number like 1e400
        throw InputError(file, "line 1", "is not a journal identity line", "remove the journal to start afresh");
      }
      if (head != id_line)
        throw InputError(file, "line 1", "belongs to another run (" + head.dump() + ")",
                         "resume with the same command and options, or remove the journal to start afresh");
      for (std::size_t i = 1; i < lines.size(); ++i) {
        const std::string place = "line " + std::to_string(i + 1);
        try {
          auto c = case_record_from_json(nlohmann::json::parse(lines[i]), file, place);
          done_[c.name] = std::move(c);
        } catch (const nlohmann::json::exception&) {  // parse_error, or out_of_range for a number like 1e400
          // Only the last line can be a write cut short by a kill; anything else is damage.
          if (i + 1 != lines.size())
            throw InputError(file, place, "is not a valid case record", "remove the journal to start afresh");
        }
      }
      if (!lines.back().empty() && done_.size() + 1 < lines.size()) {
        // Rewrite without the torn last line so appends start on a clean line;
        // atomically, so a full disk cannot cost the cases already journalled.
        std::string kept = lines[0] + '\n';
        for (std::size_t i = 1; i + 1 < lines.size(); ++i) kept += lines[i] + '\n';
        write_file_atomically(path_, kept);
      }
    }
  }
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
