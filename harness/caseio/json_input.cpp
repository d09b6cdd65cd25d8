// headroom — parsing JSON a user hands headroom (json_input.h).
#include "headroom/json_input.h"

#include <algorithm>
#include <set>
#include <vector>

#include "headroom/input_error.h"

namespace headroom {

using nlohmann::json;

std::string line_column(std::string_view text, std::size_t offset, std::size_t first_line) {
  offset = std::min(offset, text.size());
  std::size_t line = first_line, line_start = 0;
  for (std::size_t i = 0; i < offset; ++i)
    if (text[i] == '\n') {
      ++line;
      line_start = i + 1;
    }
  return "line " + std::to_string(line) + ", column " + std::to_string(offset - line_start + 1);
}

// Repeated keys: nlohmann::json keeps the last of them silently, so the parser
// callback tracks each object's keys by path.
json parse_json_input(std::string_view text, const std::string& file, const std::string& fix, std::size_t first_line) {
  struct Frame {
    std::set<std::string> keys;
    std::string current;
  };
  std::vector<Frame> stack;
  std::string repeated;
  auto callback = [&](int, json::parse_event_t ev, json& parsed) {
    switch (ev) {
      case json::parse_event_t::object_start:
      case json::parse_event_t::array_start:
        stack.push_back({});
        break;
      case json::parse_event_t::object_end:
      case json::parse_event_t::array_end:
        if (!stack.empty()) stack.pop_back();
        break;
      case json::parse_event_t::key:
        if (!stack.empty()) {
          Frame& f = stack.back();
          f.current = parsed.get<std::string>();
          if (!f.keys.insert(f.current).second && repeated.empty()) {
            for (const auto& fr : stack) repeated += (repeated.empty() || fr.current.empty() ? "" : ".") + fr.current;
          }
        }
        break;
      default:
        break;
    }
    return true;
  };
  json j;
  try {
    j = json::parse(text.begin(), text.end(), callback);
  } catch (const json::parse_error& e) {
    // what() reads "[json.exception.parse_error.101] parse error at line 1, column 5: <reason>".
    std::string reason = e.what();
    const auto at = reason.find(": ", reason.find("parse error"));
    if (at != std::string::npos) reason = reason.substr(at + 2);
    const std::size_t offset = e.byte == 0 ? 0 : e.byte - 1;
    throw InputError(file, line_column(text, offset, first_line), "not valid JSON: " + reason, fix);
  } catch (const json::out_of_range& e) {
    // A number beyond double's range (1e400): nlohmann throws out_of_range.406
    // "number overflow parsing '<token>'" without a position; locate the token.
    std::string token = e.what();
    const auto open = token.find("parsing '");
    token = open == std::string::npos ? std::string() : token.substr(open + 9, token.rfind('\'') - open - 9);
    const std::size_t at = token.empty() ? std::string_view::npos : text.find(token);
    throw InputError(file, at == std::string_view::npos ? "a number" : line_column(text, at, first_line),
                     "number " + token + " is beyond the range of a double", "write a number of plausible size");
  }
  if (!repeated.empty())
    throw InputError(file, "field \"" + repeated + "\"", "the key appears more than once", "keep one of them");
  return j;
}


}  // namespace headroom
