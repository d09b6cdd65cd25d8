// headroom — escaping text for the report formats (internal to the report stage).
#pragma once

#include <string>
#include <string_view>

namespace headroom::report_detail {

/// Returns: `text` safe inside a Markdown table cell: '|' and '\' escaped with
/// a backslash (CommonMark 0.30 §2.4; GFM tables §4.10), line ends and other
/// control characters as spaces, '<' '>' '&' as HTML entities so a name never
/// opens a tag in a renderer.
std::string markdown_cell(std::string_view text);

/// Returns: `text` as Markdown inline code, with a backtick fence longer than
/// any run of backticks in it (CommonMark 0.30 §6.1); line ends become spaces.
std::string markdown_code(std::string_view text);

/// Returns: `text` with & < > " ' as character references, safe in XML/HTML
/// content and in double- or single-quoted attributes. Characters XML 1.0
/// does not allow (§2.2: controls other than tab, LF, CR; U+FFFE/U+FFFF) and
/// bytes that are not valid UTF-8 become U+FFFD, so the result is always
/// well-formed XML.
std::string xml_escape(std::string_view text);

/// Returns: `json_text` safe inside an HTML <script> element: every '<' is
/// written "\u003c" (valid in JSON strings; outside strings JSON has no '<'),
/// so no "</script>" or "<!--" can end or confuse the element (HTML Living
/// Standard, §4.12.1.3, restrictions for contents of script elements).
std::string script_safe_json(std::string_view json_text);

}  // namespace headroom::report_detail
