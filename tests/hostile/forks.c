/* headroom tests — a plug-in that starts processes and leaves them running.
 *
 * It computes the right answer, then, by HEADROOM_HOSTILE_FORKS (read in the call):
 *   "child"    forks a child that sleeps on                 → stray_process "hr-stray"
 *   "setsid"   the same, the child in a session of its own  → stray_process "hr-stray"
 *   "double"   forks a child that forks a setsid grandchild
 *              and exits at once (a daemon's double fork)   → stray_process "hr-stray"
 *   "waited"   forks a child that exits and waits for it     → ok (nothing left)
 *   "parent"   SIGKILLs its own parent process              → a crash naming the worker
 * Every sleeper writes its pid to the descriptor HEADROOM_HOSTILE_FORKS_FD names
 * (when set), so the test can watch that it ends.
 */
#include <signal.h>
#include <stdlib.h>
#include <string.h>
#include <sys/prctl.h>
#include <sys/wait.h>
#include <unistd.h>

#include "sound_core.h"

/* The kernel returns only once its sleeper has its name: the report names it. */
static int ready[2];

static void sleep_on(void) {
  prctl(PR_SET_NAME, "hr-stray", 0, 0, 0);
  const char* fd_text = getenv("HEADROOM_HOSTILE_FORKS_FD");
  if (fd_text != NULL) {
    const pid_t me = getpid();
    (void)!write(atoi(fd_text), &me, sizeof me);
  }
  (void)!write(ready[1], "r", 1);
  for (;;) pause();
}

static void wait_ready(void) {
  char c;
  (void)!read(ready[0], &c, 1);
}

static int32_t run_forks(const hr_core_problem* p) {
  const char* mode = getenv("HEADROOM_HOSTILE_FORKS");
  if (mode == NULL) mode = "";
  const int32_t rc = sound_run(p);
  if (pipe(ready) != 0) return rc;
  if (strcmp(mode, "child") == 0 || strcmp(mode, "setsid") == 0) {
    if (fork() == 0) {
      if (strcmp(mode, "setsid") == 0) setsid();
      sleep_on();
    }
    wait_ready();
  } else if (strcmp(mode, "double") == 0) {
    const pid_t middle = fork();
    if (middle == 0) {
      if (fork() == 0) {
        setsid();
        sleep_on();
      }
      _exit(0);
    }
    waitpid(middle, NULL, 0);
    wait_ready();
  } else if (strcmp(mode, "waited") == 0) {
    const pid_t child = fork();
    if (child == 0) _exit(0);
    waitpid(child, NULL, 0);
  } else if (strcmp(mode, "parent") == 0) {
    kill(getppid(), SIGKILL);
    pause();
  }
  return rc;
}

const hr_kernel* headroom_kernel_entry(void) {
  static hr_kernel k;
  return hostile_declaration(&k, "hostile_forks", run_forks);
}
