// headroom fuzzing — parse_npy on arbitrary bytes: an InputError, or an array that survives a round trip.
//
// Any other outcome is a finding: a crash, a sanitizer report, a leak, an
// exception other than InputError, or an accepted array whose bytes do not
// match its shape or that does not read back equal after writing it out.
#include <cstddef>
#include <cstdint>
#include <cstdlib>

#include "headroom/input_error.h"
#include "headroom/npy.h"

namespace {

void check(bool ok) {
  if (!ok) std::abort();
}

}  // namespace

extern "C" int LLVMFuzzerTestOneInput(const std::uint8_t* data, std::size_t size) {
  headroom::NpyArray a;
  try {
    a = headroom::parse_npy(data, size, "fuzz.npy");
  } catch (const headroom::InputError&) {
    return 0;
  }
  // Accepted: the data must be exactly what the header describes, never more than the input held.
  const auto item = headroom::npy_item_size(a.descr);
  check(item.has_value());
  check(a.count() >= 0);
  check(a.bytes.size() == static_cast<std::size_t>(a.count()) * *item);
  check(a.bytes.size() <= size);

  // Written back (NumPy's layout) and read again, it is the same array.
  const std::vector<unsigned char> again = headroom::npy_file_bytes(a);
  const headroom::NpyArray b = headroom::parse_npy(again.data(), again.size(), "fuzz-rewritten.npy");
  check(b.shape == a.shape && b.descr == a.descr && b.bytes == a.bytes);

  // The exact conversion refuses only int64 beyond ±2^53 (npy.h).
  try {
    const headroom::Tensor t = headroom::npy_to_tensor(a, "fuzz.npy");
    check(t.shape == a.shape);
    check(t.values.size() == static_cast<std::size_t>(a.count()));
  } catch (const headroom::InputError&) {
    check(a.descr == "<i8");
  }
  return 0;
}
