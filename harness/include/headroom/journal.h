// headroom — the journal: finished cases appended as they finish, so nothing is lost.
//
// A long run (qualify, hunt, replay) appends each finished case's record as one
// JSON line, flushed to disk, to its journal. After Ctrl-C, SIGTERM or a killed
// process, `--resume` reads the journal back and runs only the cases not in it;
// case records carry no timings, so the resumed result equals an uninterrupted
// one. The first line identifies the run (command, kernel, suite, shard,
// options); resuming a different run from a journal is refused.
#pragma once

#include <cstdio>
#include <filesystem>
#include <map>
#include <string>

#include "headroom/record.h"

namespace headroom {

class Journal {
 public:
  /// Opens `path` for appending. With `resume`, reads the cases already there
  /// (an unreadable last line — a write cut short by a kill — is dropped);
  /// without it, starts the file afresh. Throws InputError when the journal
  /// belongs to another run (its identity line differs from `identity`),
  /// when a line other than the last is corrupt, or when it cannot be written
  /// (a full disk: the journal on disk is then left as it was).
  Journal(std::filesystem::path path, const std::string& identity, bool resume);
  ~Journal();
  Journal(const Journal&) = delete;
  Journal& operator=(const Journal&) = delete;

  /// Returns: the record of case `name` if the journal holds it.
  const CaseRecord* find(const std::string& name) const;
  std::size_t size() const { return done_.size(); }

  /// Appends a finished case and flushes it to disk before returning.
  void append(const CaseRecord& c);

  const std::filesystem::path& path() const { return path_; }

 private:
  std::filesystem::path path_;
  std::FILE* file_ = nullptr;
  std::map<std::string, CaseRecord> done_;
};

}  // namespace headroom
