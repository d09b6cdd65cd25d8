// headroom — escaping text for Markdown, XML/HTML and inline scripts (escape.h).
#include "escape.h"

#include <algorithm>
#include <cstdint>

namespace headroom::report_detail {
namespace {

// Decodes one UTF-8 sequence at text[i]; returns its length and sets `cp`,
// or returns 0 for an invalid, overlong or surrogate sequence (RFC 3629 §3).
std::size_t utf8_sequence(std::string_view text, std::size_t i, std::uint32_t& cp) {
  const auto b0 = static_cast<unsigned char>(text[i]);
  std::size_t n = 0;
  std::uint32_t min = 0;
  if (b0 < 0x80) {
    cp = b0;
    return 1;
  } else if ((b0 & 0xE0) == 0xC0) {
    n = 2, cp = b0 & 0x1F, min = 0x80;
  } else if ((b0 & 0xF0) == 0xE0) {
    n = 3, cp = b0 & 0x0F, min = 0x800;
  } else if ((b0 & 0xF8) == 0xF0) {
    n = 4, cp = b0 & 0x07, min = 0x10000;
  } else {
    return 0;
  }
  if (i + n > text.size()) return 0;
  for (std::size_t k = 1; k < n; ++k) {
    const auto b = static_cast<unsigned char>(text[i + k]);
    if ((b & 0xC0) != 0x80) return 0;
    cp = (cp << 6) | (b & 0x3F);
  }
  if (cp < min || cp > 0x10FFFF || (cp >= 0xD800 && cp <= 0xDFFF)) return 0;
  return n;
}

}  // namespace

std::string markdown_cell(std::string_view text) {
  std::string out;
  for (char ch : text) {
    switch (ch) {
      case '|': out += "\\|"; break;
      case '\\': out += "\\\\"; break;
      case '<': out += "&lt;"; break;
      case '>': out += "&gt;"; break;
      case '&': out += "&amp;"; break;
      default:
        if (static_cast<unsigned char>(ch) < 0x20 || ch == 0x7F)
          out += ' ';
        else
          out += ch;
    }
  }
  return out;
}

std::string markdown_code(std::string_view text) {
  std::string body;
  std::size_t run = 0, longest = 0;
  for (char ch : text) {
    body += (ch == '\n' || ch == '\r') ? ' ' : ch;
    run = ch == '`' ? run + 1 : 0;
    longest = std::max(longest, run);
  }
  const std::string fence(longest + 1, '`');
  // A space inside the fence keeps a leading or trailing backtick apart from it.
  const bool pad = !body.empty() && (body.front() == '`' || body.back() == '`');
  return fence + (pad ? " " : "") + body + (pad ? " " : "") + fence;
}

std::string xml_escape(std::string_view text) {
  std::string out;
  out.reserve(text.size());
  for (std::size_t i = 0; i < text.size();) {
    std::uint32_t cp = 0;
    const std::size_t n = utf8_sequence(text, i, cp);
    if (n == 0) {
      out += "\xEF\xBF\xBD";  // U+FFFD for the offending byte
      ++i;
      continue;
    }
    const bool allowed = cp == 0x9 || cp == 0xA || cp == 0xD || (cp >= 0x20 && cp != 0xFFFE && cp != 0xFFFF);
    if (!allowed) {
      out += "\xEF\xBF\xBD";
    } else if (cp == '&') {
      out += "&amp;";
    } else if (cp == '<') {
      out += "&lt;";
    } else if (cp == '>') {
      out += "&gt;";
    } else if (cp == '"') {
      out += "&quot;";
    } else if (cp == '\'') {
      out += "&apos;";
    } else {
      out.append(text.substr(i, n));
    }
    i += n;
  }
  return out;
}

std::string script_safe_json(std::string_view json_text) {
  std::string out;
  out.reserve(json_text.size());
  for (char ch : json_text) {
    if (ch == '<')
      out += "\\u003c";
    else
      out += ch;
  }
  return out;
}

}  // namespace headroom::report_detail
