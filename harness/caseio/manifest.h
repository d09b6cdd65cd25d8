// headroom — internal: a case folder's manifest.json, to and from a Case (see case_folder.h).
#pragma once

#include <cstddef>
#include <string>
#include <string_view>

#include "headroom/case.h"

namespace headroom::case_detail {

/// Returns: the case described by manifest text `text`: name, level, shape,
/// scale, source_format, mask kind and key lengths, provenance; no tensors.
/// The mask and shape go to c.core (level core) or c.block (level block).
/// Throws InputError naming `file` and the field, or the line and column of a
/// JSON syntax error, for anything case_folder.h lists as refused.
Case parse_manifest(std::string_view text, const std::string& file);

/// Returns: the manifest of `c` as pretty-printed JSON with a final newline:
/// keys in the documented order, the scale with 9 significant digits and as a
/// hex float. Preconditions: c.name is a valid case name.
std::string format_manifest(const Case& c);

/// Returns: whether `name` is a valid case name: 1 to 200 characters from
/// [A-Za-z0-9_.+-], and not "." or "..".
bool valid_case_name(std::string_view name);


}  // namespace headroom::case_detail
