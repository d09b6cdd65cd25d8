/* headroom tests — a plug-in that allocates without bound, touching every
 * page, and never checks what malloc returns. Expected: under the isolated
 * child's memory limit malloc returns NULL and the next write faults near
 * address 0: a crash whose detail names the memory limit; headroom itself
 * allocates nothing of it. */
#include <stdlib.h>
#include <string.h>

#include "sound_core.h"

/* Every block is kept (chained through its first word, the head in a volatile)
 * so no compiler may elide the allocations: clang removes a malloc whose block
 * is written but never read, which left an endless loop that allocated nothing. */
static void* volatile kept;

static int32_t run_greedy(const hr_core_problem* p) {
  const size_t chunk = (size_t)64 << 20;
  for (;;) {
    char* block = (char*)malloc(chunk);
    memset(block, 1, chunk); /* no NULL check: that is the hostility */
    *(void**)block = kept;
    kept = block;
    if (p == NULL) return sound_run(p); /* never: p is never NULL */
  }
}

const hr_kernel* headroom_kernel_entry(void) {
  static hr_kernel k;
  return hostile_declaration(&k, "hostile_greedy", run_greedy);
}
