// headroom — writing a file so that a reader never sees half of it.
//
// The content goes to a temporary file in the same folder, is flushed to disk,
// then renamed over the target: after a crash, a full disk or a kill, the
// target holds either its previous content or the new one, never a mix.
#pragma once

#include <filesystem>
#include <string_view>

namespace headroom {

/// Writes `content` to `path` atomically (see above). Throws InputError naming
/// the file and the reason (e.g. "No space left on device") when it cannot;
/// the previous file, if any, is then left intact and no temporary remains.
void write_file_atomically(const std::filesystem::path& path, std::string_view content);

}  // namespace headroom
