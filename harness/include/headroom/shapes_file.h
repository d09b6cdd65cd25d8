// headroom — a user's model shapes (TOML, docs/shapes-format.md) as attention shapes to qualify at.
//
// One [[attention]] table per distinct attention shape of a model (the layers
// of a decoder-only model share one): heads, kv heads, head dims, the context
// lengths served, batch sizes and query lengths. Every combination becomes a
// core shape B,Hq,Hkv,Tq,Tk,Dk,Dv (Tq capped at Tk), which `qualify --shapes`
// runs every adversarial family at (suite.h shape_requests).
#pragma once

#include <string>
#include <vector>

#include "headroom/problem.h"

namespace headroom {

/// Returns: the shapes `path` describes, in file order, without repeats.
/// Throws: InputError naming the file, the line and column of the offending
/// value and the fix, for: an unreadable file, a TOML syntax error, no
/// [[attention]] table, an unknown key, a missing or non-integer field, an
/// extent below 1, kv heads not dividing q heads, head_dim given with
/// key_dim/value_dim, or a tensor past 2^26 elements (the generator's cap).
std::vector<CoreShape> load_shapes_file(const std::string& path);

/// Returns: the shape "B,Hq,Hkv,Tq,Tk,Dk,Dv" given with --shape. Throws InputError naming `--shape`
/// (as parse_core_shape) and, past 2^26 elements per tensor, saying so.
CoreShape parse_user_shape(const std::string& text);

}  // namespace headroom
