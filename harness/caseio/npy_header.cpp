// headroom — internal: parsing and writing the .npy header dict (see npy_header.h).
#include "npy_header.h"

#include <cctype>
#include <limits>

#include "headroom/input_error.h"

namespace headroom::npy_detail {
namespace {

constexpr const char* kRewriteFix = "write the file with numpy.save or numpy.lib.format.write_array";

class DictParser {
 public:
  DictParser(std::string_view text, std::size_t offset, const std::string& file)
      : text_(text), offset_(offset), file_(file) {}

  NpyHeader parse() {
    NpyHeader h;
    bool seen_descr = false, seen_fortran = false, seen_shape = false;
    skip_space();
    expect('{', "the header to open with '{'");
    skip_space();
    while (peek() != '}') {
      const std::size_t key_at = pos_;
      const std::string key = string_literal();
      skip_space();
      expect(':', "':' after the key '" + key + "'");
      skip_space();
      if (key == "descr") {
        if (seen_descr) fail(key_at, "the key 'descr' appears twice");
        if (peek() == '[') fail(pos_, "'descr' is a structured dtype (a list of fields); headroom reads plain arrays only");
        h.descr = string_literal();
        seen_descr = true;
      } else if (key == "fortran_order") {
        if (seen_fortran) fail(key_at, "the key 'fortran_order' appears twice");
        h.fortran_order = bool_literal();
        seen_fortran = true;
      } else if (key == "shape") {
        if (seen_shape) fail(key_at, "the key 'shape' appears twice");
        h.shape = int_tuple();
        seen_shape = true;
      } else {
        fail(key_at, "unknown key '" + key + "' (a .npy header has exactly 'descr', 'fortran_order' and 'shape')");
      }
      skip_space();
      if (peek() == ',') {
        ++pos_;
        skip_space();
      } else if (peek() != '}') {
        fail(pos_, "expected ',' or '}' after the value of '" + key + "'");
      }
    }
    ++pos_;  // '}'
    skip_space();
    if (pos_ != text_.size()) fail(pos_, "unexpected text after the closing '}'");
    if (!seen_descr) fail(pos_, "the header has no 'descr' key");
    if (!seen_fortran) fail(pos_, "the header has no 'fortran_order' key");
    if (!seen_shape) fail(pos_, "the header has no 'shape' key");
    return h;
  }

 private:
  [[noreturn]] void fail(std::size_t at, const std::string& problem) const {
    throw InputError(file_, "header, byte " + std::to_string(offset_ + at), problem, kRewriteFix);
  }

  // '\0' past the end: never a character the grammar accepts.
  char peek() const { return pos_ < text_.size() ? text_[pos_] : '\0'; }

  void skip_space() {
    while (pos_ < text_.size() && (text_[pos_] == ' ' || text_[pos_] == '\t' || text_[pos_] == '\n' || text_[pos_] == '\r'))
      ++pos_;
  }

  void expect(char c, const std::string& what) {
    if (peek() != c) fail(pos_, "not a Python dict literal: expected " + what + (pos_ >= text_.size() ? ", found the end of the header" : ""));
    ++pos_;
  }

  std::string string_literal() {
    const char quote = peek();
    if (quote != '\'' && quote != '"') fail(pos_, "not a Python dict literal: expected a quoted string");
    const std::size_t start = ++pos_;
    while (pos_ < text_.size() && text_[pos_] != quote) {
      // Escapes never occur in the keys and dtype strings of a plain array.
      if (text_[pos_] == '\\' || text_[pos_] == '\n') fail(pos_, "unsupported character in a string literal");
      ++pos_;
    }
    if (pos_ >= text_.size()) fail(start - 1, "not a Python dict literal: unterminated string");
    return std::string(text_.substr(start, pos_++ - start));
  }

  bool word(std::string_view w) {
    if (text_.substr(pos_, w.size()) != w) return false;
    const std::size_t end = pos_ + w.size();
    if (end < text_.size() && (std::isalnum(static_cast<unsigned char>(text_[end])) || text_[end] == '_')) return false;
    pos_ = end;
    return true;
  }

  bool bool_literal() {
    if (word("True")) return true;
    if (word("False")) return false;
    fail(pos_, "'fortran_order' must be True or False");
  }

  std::int64_t int_literal() {
    const std::size_t start = pos_;
    bool negative = false;
    if (peek() == '-') {
      negative = true;
      ++pos_;
      skip_space();
    }
    if (!std::isdigit(static_cast<unsigned char>(peek()))) fail(pos_, "'shape' must be a tuple of integers");
    if (peek() == '0' && pos_ + 1 < text_.size() && std::isdigit(static_cast<unsigned char>(text_[pos_ + 1])))
      fail(pos_, "not a Python integer literal (leading zero)");
    std::int64_t v = 0;
    while (std::isdigit(static_cast<unsigned char>(peek()))) {
      const int d = peek() - '0';
      if (v > (std::numeric_limits<std::int64_t>::max() - d) / 10) fail(start, "an extent of 'shape' is too large");
      v = v * 10 + d;
      ++pos_;
    }
    if (negative) fail(start, "an extent of 'shape' is negative");
    return v;
  }

  std::vector<std::int64_t> int_tuple() {
    std::vector<std::int64_t> out;
    if (peek() != '(') fail(pos_, "'shape' must be a tuple of integers, like (2, 3) or (4,) or ()");
    ++pos_;
    skip_space();
    bool comma_after_last = false;
    while (peek() != ')') {
      out.push_back(int_literal());
      if (out.size() > 32) fail(pos_, "more than 32 axes in 'shape'");
      skip_space();
      comma_after_last = false;
      if (peek() == ',') {
        ++pos_;
        skip_space();
        comma_after_last = true;
      } else if (peek() != ')') {
        fail(pos_, "not a Python tuple: expected ',' or ')' in 'shape'");
      }
    }
    // "(3)" is the integer 3 in Python, not a tuple: NumPy would refuse it too.
    if (out.size() == 1 && !comma_after_last) fail(pos_, "'shape' (n) is an integer, not a tuple: write (n,)");
    ++pos_;
    return out;
  }

  std::string_view text_;
  std::size_t offset_;
  const std::string& file_;
  std::size_t pos_ = 0;
};

}  // namespace

NpyHeader parse_header(std::string_view text, std::size_t offset, const std::string& file) {
  return DictParser(text, offset, file).parse();
}

std::string format_header(std::string_view descr, const std::vector<std::int64_t>& shape) {
  std::string s = "{'descr': '";
  s += descr;
  s += "', 'fortran_order': False, 'shape': (";
  for (std::size_t i = 0; i < shape.size(); ++i) {
    if (i != 0) s += ", ";
    s += std::to_string(shape[i]);
  }
  if (shape.size() == 1) s += ",";
  s += "), }";
  return s;
}

}  // namespace headroom::npy_detail
