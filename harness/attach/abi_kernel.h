// headroom — a kernel reached through kernel_abi.h, bundled or loaded from a library.
//
// Internal to the attach stage: attach_in_process and attach_library both
// build this; the only difference is who keeps the code mapped (`keep_alive`
// holds the dlopen handle of a library, nothing for a bundled kernel).
#pragma once

#include <memory>
#include <string>

#include "headroom/attach.h"
#include "headroom/kernel_abi.h"

namespace headroom::attach_detail {

/// Returns: the attached kernel for `k`, whose declaration was read from
/// `origin` (checked here: InputError as declaration_of).
std::unique_ptr<AttachedKernel> make_abi_kernel(const hr_kernel* k, const std::string& origin,
                                                std::shared_ptr<void> keep_alive);

}  // namespace headroom::attach_detail
