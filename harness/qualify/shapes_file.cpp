// headroom — reading a model-shapes file (shapes_file.h, docs/shapes-format.md).
#include "headroom/shapes_file.h"

#include <algorithm>
#include <cstdint>
#include <optional>

#include <toml++/toml.h>

#include "headroom/generate.h"
#include "headroom/input_error.h"
#include "headroom/input_file.h"

namespace headroom {
namespace {

// The generator's cap on one tensor (generate.h): 2^26 elements.
constexpr std::int64_t kMaxElements = std::int64_t{1} << 26;

constexpr const char* kKeys = "name, q_heads, kv_heads, head_dim, key_dim, value_dim, context_lengths, batch_sizes, "
                              "query_lengths";

std::string place(const toml::source_region& r) {
  return "line " + std::to_string(r.begin.line) + ", column " + std::to_string(r.begin.column);
}

// The largest tensor of shape s, in elements (Q, K, V or O).
std::int64_t largest_tensor(const CoreShape& s) {
  const std::int64_t q = s.batch * s.q_heads * s.q_len * std::max(s.key_dim, s.value_dim);
  const std::int64_t kv = s.batch * s.kv_heads * s.kv_len * std::max(s.key_dim, s.value_dim);
  return std::max(q, kv);
}

class Reader {
 public:
  explicit Reader(std::string path) : path_(std::move(path)) {}

  [[noreturn]] void fail(const toml::source_region& at, const std::string& problem, const std::string& fix) const {
    throw InputError(path_, place(at), problem, fix);
  }

  std::int64_t positive(const toml::node& n, const std::string& key) const {
    const auto v = n.value<std::int64_t>();
    if (!n.is_integer() || !v) fail(n.source(), key + " must be an integer", "write e.g. " + key + " = 8");
    if (*v < 1) fail(n.source(), key + " = " + std::to_string(*v) + " is below 1", "give an integer >= 1");
    return *v;
  }

  std::vector<std::int64_t> list(const toml::node& n, const std::string& key) const {
    const toml::array* a = n.as_array();
    if (!a) fail(n.source(), key + " must be an array of integers", "write e.g. " + key + " = [1, 8]");
    if (a->empty()) fail(n.source(), key + " is empty", "give at least one value");
    std::vector<std::int64_t> out;
    for (const toml::node& e : *a) out.push_back(positive(e, key + " entry"));
    return out;
  }

  void table(const toml::table& t, std::vector<CoreShape>& out) const {
    std::optional<std::int64_t> hq, hkv, hd, dk, dv;
    std::vector<std::int64_t> ctx, batches{1}, qlens{1};
    for (const auto& [k, n] : t) {
      const std::string key(k.str());
      if (key == "name") {
        if (!n.is_string()) fail(n.source(), "name must be a string", "write e.g. name = \"decoder\"");
      } else if (key == "q_heads") hq = positive(n, key);
      else if (key == "kv_heads") hkv = positive(n, key);
      else if (key == "head_dim") hd = positive(n, key);
      else if (key == "key_dim") dk = positive(n, key);
      else if (key == "value_dim") dv = positive(n, key);
      else if (key == "context_lengths") ctx = list(n, key);
      else if (key == "batch_sizes") batches = list(n, key);
      else if (key == "query_lengths") qlens = list(n, key);
      else fail(k.source(), "unknown key \"" + key + "\" in [[attention]]", std::string("use ") + kKeys);
    }
    auto need = [&](bool have, const char* key, const char* example) {
      if (!have) fail(t.source(), std::string("[[attention]] has no ") + key, std::string("add ") + example);
    };
    need(hq.has_value(), "q_heads", "q_heads = 32");
    need(hkv.has_value(), "kv_heads", "kv_heads = 8 (equal to q_heads without grouped-query attention)");
    need(!ctx.empty(), "context_lengths", "context_lengths = [4096, 8192] (the key lengths served)");
    if (hd && (dk || dv))
      fail(t.source(), "head_dim is given with key_dim/value_dim", "give head_dim alone, or key_dim and value_dim");
    if (!hd && !(dk && dv)) fail(t.source(), "[[attention]] has no head dims", "add head_dim = 128, or key_dim and value_dim");
    if (*hq % *hkv != 0)
      fail(t.source(), "q_heads = " + std::to_string(*hq) + " is not a multiple of kv_heads = " + std::to_string(*hkv),
           "each kv head serves q_heads / kv_heads query heads: make q_heads a multiple of kv_heads");
    for (std::int64_t b : batches)
      for (std::int64_t tq : qlens)
        for (std::int64_t tk : ctx) {
          const CoreShape s{b, *hq, *hkv, std::min(tq, tk), tk, hd ? *hd : *dk, hd ? *hd : *dv};
          if (largest_tensor(s) > kMaxElements)
            fail(t.source(), "shape " + core_shape_text(s) + " has a tensor of more than 2^26 elements",
                 "qualify smaller batches or contexts of this shape (the error grows with Tk, not with the batch: "
                 "batch 1 at the longest context judges it)");
          if (std::find(out.begin(), out.end(), s) == out.end()) out.push_back(s);
        }
  }

 private:
  std::string path_;
};

}  // namespace

std::vector<CoreShape> load_shapes_file(const std::string& path) {
  // A page of TOML; read bounded, so a FIFO, a device or a folder is refused, never waited on.
  static constexpr InputKind kShapesFile{"model shapes file", std::uint64_t{1} << 20,
                                         "give the path of a shapes file (TOML, docs/shapes-format.md)"};
  const std::string text = read_input_file(path, kShapesFile);
  toml::table root;
  try {
    root = toml::parse(text, path);
  } catch (const toml::parse_error& e) {
    throw InputError(path, place(e.source()), std::string(e.description()),
                     "fix the TOML syntax (docs/shapes-format.md has an example)");
  }
  const Reader r(path);
  std::vector<CoreShape> out;
  for (const auto& [k, n] : root) {
    if (k.str() != "attention")
      r.fail(k.source(), "unknown top-level key \"" + std::string(k.str()) + "\"",
             "describe each attention shape in an [[attention]] table");
    const toml::array* a = n.as_array();
    if (!a || !a->is_array_of_tables())
      r.fail(n.source(), "attention must be an array of tables", "write [[attention]] above each shape's keys");
    for (const toml::node& t : *a) r.table(*t.as_table(), out);
  }
  if (out.empty())
    throw InputError(path, "line 1", "no [[attention]] table",
                     "describe the model's attention, e.g. [[attention]] q_heads = 32 kv_heads = 8 head_dim = 128 "
                     "context_lengths = [4096]");
  return out;
}

CoreShape parse_user_shape(const std::string& text) {
  const CoreShape s = parse_core_shape(text, "--shape");
  if (largest_tensor(s) > kMaxElements)
    throw InputError("command line", "--shape " + text, "a tensor of this shape would exceed 2^26 elements",
                     "use a smaller batch or Tk (batch 1 at the longest Tk judges the long rows)");
  return s;
}

}  // namespace headroom
