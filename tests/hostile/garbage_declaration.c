/* headroom tests — a plug-in whose declaration is garbage, one way at a time.
 *
 * HEADROOM_HOSTILE_DECLARATION (read each time the entry is called) picks the
 * garbage; each must be refused by attach_library with an InputError naming
 * the library and the field. Unset, the declaration is sound.
 */
#include <limits.h>
#include <stdlib.h>
#include <string.h>

#include "sound_core.h"

const hr_kernel* headroom_kernel_entry(void) {
  static hr_kernel k;
  static char unterminated[100];
  const char* mode = getenv("HEADROOM_HOSTILE_DECLARATION");
  hostile_declaration(&k, "hostile_garbage", sound_run);
  if (mode == NULL) return &k;
  if (strcmp(mode, "null_declaration") == 0) return NULL;
  if (strcmp(mode, "null_name") == 0) k.name = NULL;
  if (strcmp(mode, "empty_name") == 0) k.name = "";
  if (strcmp(mode, "unterminated_name") == 0) {
    memset(unterminated, 'a', sizeof unterminated); /* no terminator within 100 bytes */
    k.name = unterminated;
  }
  if (strcmp(mode, "shouting_name") == 0) k.name = "../../Evil Kernel";
  if (strcmp(mode, "negative_max_kv_len") == 0) k.max_kv_len = -16;
  if (strcmp(mode, "level_7") == 0) k.level = 7;
  if (strcmp(mode, "input_format_99") == 0) k.input_format = 99;
  if (strcmp(mode, "output_format_negative") == 0) k.output_format = -1;
  if (strcmp(mode, "output_int8") == 0) k.output_format = HR_FORMAT_INT8;
  if (strcmp(mode, "masked_row_42") == 0) k.masked_row = 42;
  if (strcmp(mode, "mask_bits_unknown") == 0) k.mask_kinds = 0x80000000u;
  if (strcmp(mode, "no_masks") == 0) k.mask_kinds = 0;
  if (strcmp(mode, "layouts_unknown") == 0) k.layouts = 0xF0u;
  if (strcmp(mode, "returns_lse_2") == 0) k.returns_lse = 2;
  if (strcmp(mode, "granularity_9") == 0) {
    k.input_format = HR_FORMAT_INT8;
    k.q_quant.granularity = 9;
  }
  if (strcmp(mode, "asymmetric_minus_1") == 0) {
    k.input_format = HR_FORMAT_INT8;
    k.k_quant.asymmetric = -1;
  }
  if (strcmp(mode, "no_run_function") == 0) k.run_core = NULL;
  if (strcmp(mode, "both_run_functions") == 0) k.run_block = (int32_t(*)(const hr_block_problem*))sound_run;
  if (strcmp(mode, "abi_version_max") == 0) k.abi_version = UINT_MAX;
  return &k;
}
