/* headroom tests — a plug-in that calls exit() in the middle of a call, after
 * registering an atexit handler that writes to stdout. Expected: a crash
 * "the kernel called exit(5)", nothing on headroom's stdout, the next case runs. */
#include <stdlib.h>
#include <unistd.h>

#include "sound_core.h"

static void on_exit_chatter(void) {
  static const char text[] = "hostile_exits: atexit handler ran\n";
  (void)!write(1, text, sizeof text - 1);
}

static int32_t run_exits(const hr_core_problem* p) {
  sound_run(p);
  atexit(on_exit_chatter);
  exit(5);
}

const hr_kernel* headroom_kernel_entry(void) {
  static hr_kernel k;
  return hostile_declaration(&k, "hostile_exits", run_exits);
}
