// headroom tests — an external program that runs examples/plugin/my_kernel.c through the
// .npy exchange (docs/external-program.md), so the same kernel code can be compared
// across every attachment mode bit for bit. Handles float32 core problems, all masks.
#include <cstdio>
#include <cstring>
#include <filesystem>
#include <fstream>
#include <iostream>
#include <vector>

#include <nlohmann/json.hpp>

#include "headroom/external_program.h"
#include "headroom/kernel.h"
#include "headroom/kernel_abi.h"
#include "headroom/npy.h"

extern "C" const hr_kernel* headroom_kernel_entry(void);

namespace {

namespace fs = std::filesystem;

void contiguous(const std::vector<std::int64_t>& shape, std::int64_t extents[4], std::int64_t strides[4]) {
  for (int a = 0; a < 4; ++a) extents[a] = shape[static_cast<std::size_t>(a)];
  strides[3] = 1;
  for (int a = 2; a >= 0; --a) strides[a] = strides[a + 1] * extents[a + 1];
}

int run(const fs::path& dir) {
  std::ifstream f(dir / "problem.json");
  const nlohmann::json problem = nlohmann::json::parse(f);
  const nlohmann::json& s = problem.at("shape");
  headroom::NpyArray q = headroom::read_npy(dir / "q.npy");
  headroom::NpyArray k = headroom::read_npy(dir / "k.npy");
  headroom::NpyArray v = headroom::read_npy(dir / "v.npy");
  hr_core_problem p{};
  p.batch = s.at("batch"), p.q_heads = s.at("q_heads"), p.kv_heads = s.at("kv_heads");
  p.q_len = s.at("q_len"), p.kv_len = s.at("kv_len"), p.key_dim = s.at("key_dim"), p.value_dim = s.at("value_dim");
  p.scale = static_cast<float>(std::strtod(problem.at("scale_hex").get<std::string>().c_str(), nullptr));
  for (auto [t, a] : {std::pair{&p.q, &q}, std::pair{&p.k, &k}, std::pair{&p.v, &v}}) {
    t->data = a->bytes.data();
    t->format = HR_FORMAT_FLOAT32;
    contiguous(a->shape, t->extents, t->strides);
  }
  const std::string kind = problem.at("mask").at("kind");
  headroom::NpyArray mask;
  if (problem.at("mask").contains("file")) mask = headroom::read_npy(dir / problem.at("mask").at("file").get<std::string>());
  p.mask.kind = kind == "none" ? HR_MASK_NONE
              : kind == "causal_top_left" ? HR_MASK_CAUSAL_TOP_LEFT
              : kind == "causal_bottom_right" ? HR_MASK_CAUSAL_BOTTOM_RIGHT
              : kind == "key_padding" ? HR_MASK_KEY_PADDING
              : kind == "dense" ? HR_MASK_DENSE : HR_MASK_BIAS;
  if (kind == "key_padding") p.mask.key_lengths = reinterpret_cast<const std::int64_t*>(mask.bytes.data());
  if (kind == "dense" || kind == "bias") {
    contiguous(mask.shape, p.mask.extents, p.mask.strides);
    if (p.mask.extents[1] == 1) p.mask.strides[1] = 0;
    if (kind == "dense") p.mask.allowed = mask.bytes.data();
    if (kind == "bias") p.mask.bias = reinterpret_cast<const float*>(mask.bytes.data());
  }
  headroom::NpyArray o{{p.batch, p.q_heads, p.q_len, p.value_dim}, "<f4", {}};
  o.bytes.resize(static_cast<std::size_t>(o.count()) * 4);
  p.o.data = o.bytes.data();
  p.o.format = HR_FORMAT_FLOAT32;
  contiguous(o.shape, p.o.extents, p.o.strides);
  headroom::NpyArray lse{{p.batch, p.q_heads, p.q_len}, "<f4", {}};
  lse.bytes.resize(static_cast<std::size_t>(lse.count()) * 4);
  if (problem.at("returns_lse").get<bool>()) p.lse = reinterpret_cast<float*>(lse.bytes.data());
  if (headroom_kernel_entry()->run_core(&p) != HR_OK) return headroom::kExternalExitUnsupported;
  headroom::write_npy(dir / "o.npy", o);
  if (p.lse != nullptr) headroom::write_npy(dir / "lse.npy", lse);
  return 0;
}

// Persistent mode (docs/external-program.md): one ready line, then one reply per request line.
int serve() {
  std::cout << "{\"serve\": " << headroom::kServeProtocolVersion << "}" << std::endl;
  std::string line;
  while (std::getline(std::cin, line)) {
    const nlohmann::json request = nlohmann::json::parse(line);
    const int rc = run(request.at("run").get<std::string>());
    const char* status = rc == 0 ? "ok" : rc == headroom::kExternalExitUnsupported ? "unsupported" : "error";
    std::cout << nlohmann::json{{"call", request.at("call")}, {"status", status}}.dump() << std::endl;
  }
  return 0;
}

}  // namespace

// protocol_driver [--serve] describe | run DIR | serve
int main(int argc, char** argv) {
  const bool serving = argc >= 2 && std::strcmp(argv[1], "--serve") == 0;
  if (serving) --argc, ++argv;
  if (argc == 2 && std::strcmp(argv[1], "describe") == 0) {
    nlohmann::json d = nlohmann::json::parse(
        headroom::declaration_to_json(headroom::declaration_of(headroom_kernel_entry(), "protocol_driver")));
    if (serving) d["serve"] = headroom::kServeProtocolVersion;
    std::cout << d.dump(2) << '\n';
    return 0;
  }
  if (argc == 3 && std::strcmp(argv[1], "run") == 0) return run(argv[2]);
  if (argc == 2 && std::strcmp(argv[1], "serve") == 0) return serve();
  std::cerr << "usage: protocol_driver [--serve] describe | run DIR | serve\n";
  return 2;
}
