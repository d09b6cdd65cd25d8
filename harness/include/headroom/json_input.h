// headroom — parsing JSON a user hands headroom: every error with its line and column.
//
// Used by every JSON reader (case manifest, run record, journal line, program
// declaration). Beyond nlohmann::json's own checks it refuses a key repeated
// in one object (nlohmann keeps the last silently), and it locates a number
// beyond double's range (1e400), which nlohmann reports without a position.
#pragma once

#include <cstddef>
#include <string>
#include <string_view>

#include <nlohmann/json.hpp>

namespace headroom {

/// Returns: "line L, column C" (both from 1) of 0-based byte `offset` in
/// `text`, counting lines from `first_line` (for text that is one line of a
/// larger file).
std::string line_column(std::string_view text, std::size_t offset, std::size_t first_line = 1);

/// Returns: the JSON value in `text`. Throws InputError(file, "line L, column
/// C", problem, fix) for a syntax error or a number beyond double's range, and
/// InputError(file, "field \"a.b\"", ...) for a key repeated in one object.
/// Lines are counted from `first_line`. `fix` is the advice for a syntax error.
nlohmann::json parse_json_input(std::string_view text, const std::string& file, const std::string& fix,
                                std::size_t first_line = 1);

}  // namespace headroom
