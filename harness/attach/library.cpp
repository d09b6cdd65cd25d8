// headroom — loading a kernel plug-in from a shared library (attach.h).
#include <dlfcn.h>

#include <filesystem>
#include <memory>
#include <string>
#include <system_error>

#include "attach/abi_kernel.h"
#include "headroom/attach.h"
#include "headroom/input_error.h"
#include "headroom/kernel_abi.h"

namespace headroom {
namespace {

constexpr const char* kBuildHint =
    "build it with `cc -shared -fPIC -O2 -I<headroom>/harness/include my_kernel.c -o libmy_kernel.so -lm` "
    "(see examples/plugin/README.md)";

}  // namespace

std::unique_ptr<AttachedKernel> attach_library(const std::string& path) {
  std::error_code ec;
  const auto status = std::filesystem::status(path, ec);
  if (status.type() == std::filesystem::file_type::not_found) {
    throw InputError(path, "file", "no such file", std::string("check the path, or ") + kBuildHint);
  }
  if (ec || status.type() != std::filesystem::file_type::regular) {
    throw InputError(path, "file", ec ? "cannot be read: " + ec.message() : "not a regular file",
                     std::string("give the path of the built library; ") + kBuildHint);
  }
  // dlopen searches the library path for a bare name; a user naming a file
  // means that file, so anchor it.
  const std::string where = path.find('/') == std::string::npos ? "./" + path : path;
  dlerror();
  void* handle = dlopen(where.c_str(), RTLD_NOW | RTLD_LOCAL);
  if (handle == nullptr) {
    const char* why = dlerror();
    throw InputError(path, "dlopen", why != nullptr ? why : "cannot be loaded",
                     std::string("make sure it is a shared library for this machine whose dependencies resolve; ") + kBuildHint);
  }
  std::shared_ptr<void> keep(handle, [](void* h) { dlclose(h); });
  dlerror();
  void* sym = dlsym(handle, HEADROOM_KERNEL_ENTRY);
  if (sym == nullptr) {
    throw InputError(path, "symbol " HEADROOM_KERNEL_ENTRY, "the library does not export " HEADROOM_KERNEL_ENTRY,
                     "define `const hr_kernel* " HEADROOM_KERNEL_ENTRY "(void)` with C linkage (extern \"C\" in C++) "
                     "and default visibility");
  }
  // POSIX dlsym returns data and function addresses alike as void*.
  auto entry = reinterpret_cast<hr_kernel_entry_fn>(sym);
  const hr_kernel* k = entry();
  return attach_detail::make_abi_kernel(k, path, std::move(keep));
}

}  // namespace headroom
