// headroom — the one error type for bad input: it names the file, the place and the fix.
//
// Every reader (npy, case manifest, budget file, plug-in, external output)
// throws InputError; the command line prints what() as one line and exits 2.
#pragma once

#include <cstddef>
#include <stdexcept>
#include <string>
#include <string_view>

namespace headroom {

/// Returns: `text` with every control byte (0x00-0x1F, 0x7F) written as \xNN,
/// so a message stays one line and a NUL cannot cut it short when printed as
/// a C string. Other bytes (UTF-8 included) are kept.
inline std::string one_line(std::string_view text) {
  static constexpr char kHex[] = "0123456789ABCDEF";
  std::string out;
  out.reserve(text.size());
  for (const char ch : text) {
    const auto b = static_cast<unsigned char>(ch);
    if (b < 0x20 || b == 0x7F) {
      out += "\\x";
      out += kHex[b >> 4];
      out += kHex[b & 15];
    } else {
      out += ch;
    }
  }
  return out;
}

/// Returns: `value` (read from an input) in double quotes for a message:
/// control bytes escaped as one_line does, a quote or backslash escaped with
/// a backslash, and a value longer than `max_bytes` cut there with an
/// ellipsis and "(cut at byte N of M)". A cut never splits a UTF-8 sequence.
inline std::string quote_input(std::string_view value, std::size_t max_bytes = 80) {
  std::size_t keep = value.size();
  if (keep > max_bytes) {
    keep = max_bytes;
    while (keep > 0 && (static_cast<unsigned char>(value[keep]) & 0xC0) == 0x80) --keep;  // not inside a sequence
  }
  std::string body;
  for (const char ch : value.substr(0, keep)) {
    if (ch == '"' || ch == '\\') body += '\\';
    body += ch;
  }
  std::string out = "\"" + one_line(body) + "\"";
  if (keep < value.size())
    out += "… (cut at byte " + std::to_string(keep) + " of " + std::to_string(value.size()) + ")";
  return out;
}

class InputError : public std::runtime_error {
 public:
  /// file: the path as the user gave it; place: where in it ("line 4",
  /// "header", "field \"scale\""); problem: what is wrong; fix: what to do.
  /// Control bytes in any of them are escaped (one_line); a value read from
  /// the input belongs in quote_input().
  InputError(std::string file, std::string place, std::string problem, std::string fix)
      : std::runtime_error(one_line(file) + ": " + one_line(place) + ": " + one_line(problem) + " (fix: " +
                           one_line(fix) + ")"),
        file_(one_line(file)), place_(one_line(place)), problem_(one_line(problem)), fix_(one_line(fix)) {}
  const std::string& file() const { return file_; }
  const std::string& place() const { return place_; }
  const std::string& problem() const { return problem_; }
  const std::string& fix() const { return fix_; }

 private:
  std::string file_, place_, problem_, fix_;
};

}  // namespace headroom
