// headroom — internal: the Python dict literal that heads a .npy file.
//
// NumPy writes the header with repr() of a dict and reads it back with
// ast.literal_eval (numpy/lib/format.py, read_array_header). We accept the
// subset of Python literal syntax that such a dict can take — quoted strings,
// True/False, tuples of decimal integers, whitespace and trailing commas — and
// refuse everything else with the byte offset of the first offending
// character, so a corrupt file is located rather than guessed at.
#pragma once

#include <cstddef>
#include <cstdint>
#include <string>
#include <string_view>
#include <vector>

namespace headroom::npy_detail {

struct NpyHeader {
  std::string descr;
  bool fortran_order = false;
  std::vector<std::int64_t> shape;
};

/// Returns: the three fields of the header dict `text`.
/// `offset` is the file offset of text[0], for error places ("byte N").
/// Throws InputError naming `file` when `text` is not a dict literal with
/// exactly the keys 'descr' (a string), 'fortran_order' (a bool) and 'shape'
/// (a tuple of integers), followed only by whitespace.
NpyHeader parse_header(std::string_view text, std::size_t offset, const std::string& file);

/// Returns: the dict literal NumPy would write for these fields, unpadded:
/// "{'descr': '<f4', 'fortran_order': False, 'shape': (2, 3), }".
std::string format_header(std::string_view descr, const std::vector<std::int64_t>& shape);

}  // namespace headroom::npy_detail
