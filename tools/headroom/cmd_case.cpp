// headroom case — make one adversarial case folder from (family, seed, size), and list the families.
#include <charconv>
#include <cstdio>
#include <filesystem>
#include <memory>
#include <string>

#include "command.h"
#include "usage_error.h"
#include "headroom/case_folder.h"
#include "headroom/families.h"
#include "headroom/generate.h"
#include "headroom/input_error.h"

namespace headroom::cli {
namespace {

struct MakeFlags {
  std::string family;
  std::uint64_t seed = 0;
  int size = kDefaultSize;
  std::string shape, mask, level, shrink_path, out;
  std::int64_t model_dim = 0;
  bool model_dim_given = false;
};

std::vector<int> parse_path(const std::string& text) {
  std::vector<int> path;
  std::size_t start = 0;
  while (start <= text.size()) {
    const std::size_t comma = std::min(text.find(',', start), text.size());
    int i = -1;
    const auto [end, ec] = std::from_chars(text.data() + start, text.data() + comma, i);
    if (ec != std::errc{} || end != text.data() + comma || i < 0)
      throw InputError("command line", "--shrink-path", "\"" + text + "\" is not a list of indices ≥ 0",
                       "write the path as recorded in a case's provenance, e.g. 3,0,2");
    path.push_back(i);
    start = comma + 1;
  }
  return path;
}

CaseRequest request_of(const MakeFlags& f) {
  CaseRequest r;
  r.family = f.family;
  r.seed = f.seed;
  r.size = f.size;
  if (!f.shape.empty()) r.shape = parse_core_shape(f.shape, "--shape");
  if (!f.mask.empty()) {
    r.mask = parse_mask_kind(f.mask);
    if (!r.mask)
      throw InputError("command line", "--mask", "unknown mask kind \"" + f.mask + "\"",
                       "use none, causal_top_left, causal_bottom_right, key_padding, dense or bias");
  }
  if (!f.level.empty()) {
    if (f.level != "core" && f.level != "block")
      throw InputError("command line", "--level", "unknown level \"" + f.level + "\"", "use core or block");
    r.level = f.level == "block" ? Level::block : Level::core;
  }
  if (f.model_dim_given) r.model_dim = f.model_dim;
  if (!f.shrink_path.empty()) r.shrink_path = parse_path(f.shrink_path);
  return r;
}

int make_main(const MakeFlags& f) {
  const Case c = make_case(request_of(f));
  // The folder is new; its parent may be too (e.g. --out cases/today/c1).
  const std::filesystem::path parent = std::filesystem::path(f.out).parent_path();
  std::error_code ec;
  if (!parent.empty()) std::filesystem::create_directories(parent, ec);
  if (ec)
    throw InputError("command line", "--out " + f.out, "cannot create its folder " + parent.string() + ": " + ec.message(),
                     "give a path in a folder you can write");
  write_case(c, f.out);
  std::printf("wrote %s (%s)\n", f.out.c_str(), c.name.c_str());
  return 0;
}

int families_main() {
  for (const FamilyInfo& f : kFamilies)
    std::printf("%-20s %-5s %s\n", std::string(f.name).c_str(), f.level == Level::block ? "block" : "core",
                std::string(f.summary).c_str());
  return 0;
}

const CommandRegistration reg{
    "case", 10, [](CLI::App& app) {
      auto* cmd = app.add_subcommand("case", "Make adversarial case folders; list the generator families");
      cmd->require_subcommand(1);

      auto flags = std::make_shared<MakeFlags>();
      auto* make = cmd->add_subcommand("make", "Write the case of (family, seed, size) as a case folder");
      make->add_option("--family", flags->family, "generator family (see `headroom case families`)")->required();
      make->add_option("--seed", flags->seed, "RapidCheck seed")->required()->check(seed_value("--seed"));
      make->add_option("--size", flags->size, "generation size, 0..1000 (default 100, RapidCheck's nominal size)")
          ->check(integer_in("--size", 0, kMaxSize, "100", "100 is RapidCheck's nominal size"));
      make->add_option("--shape", flags->shape, "fix the shape: B,Hq,Hkv,Tq,Tk,Dk,Dv");
      make->add_option("--mask", flags->mask,
                       "force the mask kind: none, causal_top_left, causal_bottom_right, key_padding, dense, bias");
      make->add_option("--level", flags->level, "core or block (must match the family)");
      auto* model_dim = make->add_option("--model-dim", flags->model_dim,
                                         "block level: the model dim Dm (default Hq·Dk with --shape)")
                            ->check(integer_in("--model-dim", 1, kMaxTensorElements, "512"));
      make->add_option("--shrink-path", flags->shrink_path,
                       "follow these shrink indices, e.g. 3,0,2 (as recorded in provenance)");
      make->add_option("--out", flags->out, "the case folder to write")->required();
      make->callback([flags, model_dim] {
        flags->model_dim_given = model_dim->count() > 0;
        exit_with(make_main(*flags));
      });

      auto* list = cmd->add_subcommand("families", "List the generator families, one a line: name, level, summary");
      list->callback([] { exit_with(families_main()); });
    }};

}  // namespace
}  // namespace headroom::cli
