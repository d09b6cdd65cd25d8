// headroom — the one error type for bad input: it names the file, the place and the fix.
//
// Every reader (npy, case manifest, budget file, plug-in, external output)
// throws InputError; the command line prints what() as one line and exits 2.
#pragma once

#include <stdexcept>
#include <string>

namespace headroom {

class InputError : public std::runtime_error {
 public:
  /// file: the path as the user gave it; place: where in it ("line 4",
  /// "header", "field \"scale\""); problem: what is wrong; fix: what to do.
  InputError(std::string file, std::string place, std::string problem, std::string fix)
      : std::runtime_error(file + ": " + place + ": " + problem + " (fix: " + fix + ")"),
        file_(std::move(file)), place_(std::move(place)), problem_(std::move(problem)), fix_(std::move(fix)) {}
  const std::string& file() const { return file_; }
  const std::string& place() const { return place_; }
  const std::string& problem() const { return problem_; }
  const std::string& fix() const { return fix_; }

 private:
  std::string file_, place_, problem_, fix_;
};

}  // namespace headroom
