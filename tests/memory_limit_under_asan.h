// headroom tests — under AddressSanitizer, a refused allocation returns NULL as it would without it.
//
// ASan's allocator ends the process itself when the memory limit refuses a
// mapping (its default, allocator_may_return_null=0), before a greedy kernel's
// own NULL dereference can show headroom naming the limit. A test binary whose
// kernels meet the memory limit includes this header in exactly one file: it
// sets the runtime's default options for that binary only (read at start-up).
// GCC says __SANITIZE_ADDRESS__; clang says __has_feature(address_sanitizer).
#pragma once

#if defined(__SANITIZE_ADDRESS__)
#define HEADROOM_TEST_UNDER_ASAN 1
#elif defined(__has_feature)
#if __has_feature(address_sanitizer)
#define HEADROOM_TEST_UNDER_ASAN 1
#endif
#endif

#if defined(HEADROOM_TEST_UNDER_ASAN)
extern "C" const char* __asan_default_options() { return "allocator_may_return_null=1"; }
#endif
