// headroom tests — one kernel through every attachment mode, and the external-program exchange.
#include <dlfcn.h>
#include <sys/wait.h>
#include <unistd.h>

#include <algorithm>
#include <cerrno>
#include <chrono>
#include <cmath>
#include <cstdio>
#include <cstdlib>
#include <filesystem>
#include <fstream>
#include <string>

#include <gtest/gtest.h>
#include <nlohmann/json.hpp>

#include "attach_cases.h"
#include "headroom/attach.h"
#include "headroom/external_program.h"
#include "headroom/input_error.h"
#include "headroom/kernel_abi.h"
#include "headroom/npy.h"
#include "leftovers.h"

namespace headroom {
namespace {

namespace fs = std::filesystem;
using testing::block_case;
using testing::core_case;
using testing::count_exchange_folders;
using testing::count_fds;

bool contains(const std::string& s, const std::string& part) { return s.find(part) != std::string::npos; }

RunOptions quick() { return RunOptions{true, 10.0, std::uint64_t{4} << 30}; }


// ---- one kernel, four ways in ----------------------------------------------

struct Plugin {
  void* handle = dlopen(HEADROOM_EXAMPLE_PLUGIN, RTLD_NOW | RTLD_LOCAL);
  ~Plugin() {
    if (handle != nullptr) dlclose(handle);
  }
  const hr_kernel* kernel() const {
    auto entry = reinterpret_cast<hr_kernel_entry_fn>(dlsym(handle, HEADROOM_KERNEL_ENTRY));
    return entry != nullptr ? entry() : nullptr;
  }
};

TEST(AttachModes, SameKernelBitIdenticalInEveryMode) {
  Plugin plugin;
  ASSERT_NE(plugin.kernel(), nullptr) << dlerror();
  auto in_process = attach_in_process(plugin.kernel());
  auto library = attach_library(HEADROOM_EXAMPLE_PLUGIN);
  auto program = attach_program(HEADROOM_PROTOCOL_DRIVER, 10.0);
  ASSERT_EQ(program->declaration().name, "my_kernel");
  ASSERT_EQ(program->declaration().mask_kinds, in_process->declaration().mask_kinds);
  const struct {
    CoreShape shape;
    MaskKind mask;
  } cases[] = {
      {{1, 2, 2, 5, 7, 8, 8}, MaskKind::none},
      {{2, 4, 2, 6, 3, 5, 7}, MaskKind::causal_bottom_right},  // Tq > Tk: fully masked rows, grouped heads
      {{2, 2, 1, 4, 9, 4, 6}, MaskKind::key_padding},
      {{1, 3, 3, 5, 6, 4, 4}, MaskKind::dense},
      {{1, 2, 2, 4, 5, 3, 3}, MaskKind::bias},
  };
  std::uint32_t seed = 100;
  double seconds[4] = {0, 0, 0, 0};
  auto timed = [&](int mode, AttachedKernel& k, const ReceivedCase& r, const RunOptions& opt) {
    const auto start = std::chrono::steady_clock::now();
    KernelRun run = k.run(r, opt);
    seconds[mode] += std::chrono::duration<double>(std::chrono::steady_clock::now() - start).count();
    return run;
  };
  for (const auto& tc : cases) {
    const Case c = core_case(tc.shape, tc.mask, seed++, /*allow_empty_rows=*/true);
    const ReceivedCase r = receive(c, in_process->declaration());
    const KernelRun a = timed(0, *in_process, r, RunOptions{false, 10.0, 0});
    const KernelRun b = timed(1, *in_process, r, quick());
    const KernelRun l = timed(2, *library, r, quick());
    const KernelRun p = timed(3, *program, r, quick());
    for (const KernelRun* run : {&a, &b, &l, &p}) ASSERT_EQ(run->status, RunStatus::ok) << run->detail;
    const std::string what = std::string(mask_kind_name(tc.mask));
    EXPECT_TRUE(bit_identical(a.out, b.out)) << what << ": isolated child differs from in-process";
    EXPECT_TRUE(bit_identical(a.out, l.out)) << what << ": shared library differs";
    EXPECT_TRUE(bit_identical(a.out, p.out)) << what << ": external program differs";
    EXPECT_TRUE(bit_identical(a.lse, b.lse) && bit_identical(a.lse, l.lse) && bit_identical(a.lse, p.lse)) << what;
    EXPECT_EQ(a.out.shape, (std::vector<std::int64_t>{tc.shape.batch, tc.shape.q_heads, tc.shape.q_len, tc.shape.value_dim}));
  }
  std::printf("mean call on tiny cases: in-process %.3f ms, isolated %.3f ms, library %.3f ms, program %.3f ms\n",
              seconds[0] * 200, seconds[1] * 200, seconds[2] * 200, seconds[3] * 200);
}

TEST(AttachModes, NumpyExampleAgreesWithTheCExample) {
  auto numpy = attach_program("/usr/bin/python3 " HEADROOM_SOURCE_DIR "/examples/external/numpy_kernel.py", 20.0);
  EXPECT_EQ(numpy->declaration().name, "numpy_textbook");
  auto c_kernel = attach_library(HEADROOM_EXAMPLE_PLUGIN);
  double worst = 0;
  std::uint32_t seed = 200;
  for (MaskKind m : {MaskKind::none, MaskKind::causal_top_left, MaskKind::key_padding, MaskKind::bias}) {
    const Case c = core_case({2, 4, 2, 5, 8, 8, 8}, m, seed++);
    const ReceivedCase r = receive(c, c_kernel->declaration());
    const KernelRun a = numpy->run(r, RunOptions{true, 20.0, std::uint64_t{8} << 30});
    const KernelRun b = c_kernel->run(r, quick());
    ASSERT_EQ(a.status, RunStatus::ok) << a.detail;
    ASSERT_EQ(b.status, RunStatus::ok) << b.detail;
    double vmax = 0;
    for (double v : c.core_inputs.v.values) vmax = std::max(vmax, std::abs(v));
    for (std::size_t i = 0; i < a.out.values.size(); ++i) worst = std::max(worst, std::abs(a.out.values[i] - b.out.values[i]) / vmax);
    for (std::size_t i = 0; i < a.lse.values.size(); ++i) EXPECT_NEAR(a.lse.values[i], b.lse.values[i], 1e-5);
  }
  // Two float32 kernels summing in different orders: each within a few γ_n
  // (n ≈ Dk + Tk ≤ 16, Higham 2002 §3.1) of the exact result, relative to max|V|;
  // 3e-5 is a generous a-priori bound, not a measured one.
  std::printf("numpy vs C example: max |Δo| / max|V| = %.3g\n", worst);
  EXPECT_LT(worst, 3e-5);
}

// ---- the exchange folder ----------------------------------------------------

class Exchange : public ::testing::Test {
 protected:
  void SetUp() override {
    dir_ = fs::temp_directory_path() / ("headroom-attach-exchange-" + std::to_string(getpid()));
    fs::create_directories(dir_);
  }
  void TearDown() override { fs::remove_all(dir_); }
  fs::path dir_;
};

KernelDeclaration declaration(Format in, Format out) {
  KernelDeclaration d;
  d.name = "exchange";
  d.input_format = in;
  d.output_format = out;
  d.mask_kinds = HR_MASK_NONE | HR_MASK_KEY_PADDING | HR_MASK_DENSE | HR_MASK_BIAS;
  d.returns_lse = true;
  return d;
}

TEST_F(Exchange, InputsInTheDeclaredFormat) {
  const Case c = core_case({2, 2, 1, 3, 4, 5, 6}, MaskKind::dense, 300);
  for (auto [format, descr] : {std::pair{Format::binary16, "<f2"}, std::pair{Format::bfloat16, "<u2"},
                               std::pair{Format::float32, "<f4"}, std::pair{Format::float64, "<f8"}}) {
    const KernelDeclaration d = declaration(format, Format::float32);
    const ReceivedCase r = receive(c, d);
    write_exchange(dir_, r, d);
    const NpyArray q = read_npy(dir_ / "q.npy");
    EXPECT_EQ(q.descr, descr);
    EXPECT_EQ(q.shape, (std::vector<std::int64_t>{2, 2, 3, 5}));
    EXPECT_TRUE(bit_identical(npy_to_tensor(q, dir_ / "q.npy"), r.received.core_inputs.q)) << descr;
    EXPECT_EQ(read_npy(dir_ / "v.npy").shape, (std::vector<std::int64_t>{2, 1, 4, 6}));
    const NpyArray mask = read_npy(dir_ / "mask.npy");
    EXPECT_EQ(mask.descr, "|b1");
    EXPECT_TRUE(bit_identical(npy_to_tensor(mask, dir_ / "mask.npy"), r.received.core.mask.allowed));
  }
  std::ifstream f(dir_ / "problem.json");
  const nlohmann::json p = nlohmann::json::parse(f);
  EXPECT_EQ(p.at("protocol"), kExternalProtocolVersion);
  EXPECT_EQ(p.at("shape").at("kv_len"), 4);
  EXPECT_EQ(p.at("mask").at("kind"), "dense");
  EXPECT_EQ(static_cast<float>(std::strtod(p.at("scale_hex").get<std::string>().c_str(), nullptr)), c.core.scale);
  EXPECT_EQ(static_cast<float>(p.at("scale").get<double>()), c.core.scale);
  EXPECT_EQ(p.at("outputs").at("o").at("shape"), nlohmann::json({2, 2, 3, 6}));
  EXPECT_EQ(p.at("outputs").at("lse").at("dtype"), "<f4");
}

TEST_F(Exchange, Int8CodesScalesZeroPointsAndMasks) {
  const Case c = core_case({2, 2, 2, 3, 4, 5, 5}, MaskKind::key_padding, 301);
  KernelDeclaration d = declaration(Format::int8, Format::float32);
  d.q_quant = {Granularity::per_token, false};
  d.k_quant = {Granularity::per_channel, true};
  const ReceivedCase r = receive(c, d);
  write_exchange(dir_, r, d);
  const NpyArray q = read_npy(dir_ / "q.npy");
  EXPECT_EQ(q.descr, "|i1");
  for (std::size_t i = 0; i < r.q8->codes.size(); ++i) EXPECT_EQ(static_cast<std::int8_t>(q.bytes[i]), r.q8->codes[i]);
  const NpyArray qs = read_npy(dir_ / "q_scale.npy");
  EXPECT_EQ(qs.descr, "<f4");
  EXPECT_EQ(qs.shape, (std::vector<std::int64_t>{2, 2, 3}));
  EXPECT_FALSE(fs::exists(dir_ / "q_zero_point.npy"));
  const NpyArray kz = read_npy(dir_ / "k_zero_point.npy");
  EXPECT_EQ(kz.descr, "<i4");
  EXPECT_EQ(kz.shape, (std::vector<std::int64_t>{2, 5}));
  const NpyArray lengths = read_npy(dir_ / "key_lengths.npy");
  EXPECT_EQ(lengths.descr, "<i8");
  const Tensor lt = npy_to_tensor(lengths, dir_ / "key_lengths.npy");
  for (std::size_t b = 0; b < 2; ++b) EXPECT_EQ(lt.values[b], static_cast<double>(c.core.mask.key_lengths[b]));
  std::ifstream f(dir_ / "problem.json");
  const nlohmann::json p = nlohmann::json::parse(f);
  EXPECT_EQ(p.at("quant").at("k").at("granularity"), "per_channel");
  EXPECT_EQ(p.at("quant").at("k").at("zero_point"), "k_zero_point.npy");
}

TEST_F(Exchange, BlockFilesAndAbsentBiases) {
  const Case c = block_case({1, 2, 3, 4, 2, 1, 2, 2}, 302, false);
  KernelDeclaration d = declaration(Format::bfloat16, Format::binary16);
  d.level = Level::block;
  d.returns_lse = false;
  const ReceivedCase r = receive(c, d);
  write_exchange(dir_, r, d);
  EXPECT_EQ(read_npy(dir_ / "w_o.npy").shape, (std::vector<std::int64_t>{4, 4}));
  EXPECT_EQ(read_npy(dir_ / "x_kv.npy").descr, "<u2");
  EXPECT_FALSE(fs::exists(dir_ / "b_q.npy"));
  // A binary16 output comes back as its values.
  Tensor y({1, 2, 4});
  for (std::size_t i = 0; i < y.values.size(); ++i) y.values[i] = 0.5 * static_cast<double>(i) - 1.0;
  write_npy(dir_ / "y.npy", tensor_to_npy(y, Format::binary16));
  const KernelRun run = read_exchange(dir_, r, d);
  ASSERT_EQ(run.status, RunStatus::ok) << run.detail;
  EXPECT_TRUE(bit_identical(run.out, y));
}

// ---- misbehaving programs -------------------------------------------------

class Programs : public ::testing::Test {
 protected:
  static void SetUpTestSuite() {
    fix_ = fs::temp_directory_path() / ("headroom-attach-programs-" + std::to_string(getpid()));
    fs::create_directories(fix_);
    const CoreShape s = shape();
    Tensor o({s.batch, s.q_heads, s.q_len, s.value_dim});
    Tensor lse({s.batch, s.q_heads, s.q_len});
    write_npy(fix_ / "o_good.npy", tensor_to_npy(o, Format::float32));
    write_npy(fix_ / "lse_good.npy", tensor_to_npy(lse, Format::float32));
    write_npy(fix_ / "o_f8.npy", tensor_to_npy(o, Format::float64));
    Tensor wrong({s.batch, s.q_heads, s.value_dim, s.q_len});  // axes swapped
    write_npy(fix_ / "o_shape.npy", tensor_to_npy(wrong, Format::float32));
    std::vector<unsigned char> bytes = npy_file_bytes(tensor_to_npy(o, Format::float32));
    bytes.resize(bytes.size() - 5);
    std::ofstream(fix_ / "o_truncated.npy", std::ios::binary).write(reinterpret_cast<const char*>(bytes.data()),
                                                                     static_cast<std::streamsize>(bytes.size()));
    KernelDeclaration d;
    d.name = "scripted";
    d.returns_lse = true;
    std::ofstream(fix_ / "decl.json") << declaration_to_json(d);
    std::ofstream(fix_ / "prog.sh") << R"(fix=$(dirname "$0")
mode=$1; shift
if [ "$1" = describe ]; then
  case $mode in
    describe_garbage) echo 'this is not JSON'; exit 0 ;;
    describe_fails) echo 'cannot start: no GPU' >&2; exit 1 ;;
    describe_hangs) exec sleep 30 ;;
  esac
  cat "$fix/decl.json"; exit 0
fi
dir=$2
echo "$dir" > "$fix/last_dir"
case $mode in
  good) cp "$fix/o_good.npy" "$dir/o.npy"; cp "$fix/lse_good.npy" "$dir/lse.npy" ;;
  inputs) for f in problem.json q.npy k.npy v.npy; do [ -f "$dir/$f" ] || exit 5; done
          cp "$fix/o_good.npy" "$dir/o.npy"; cp "$fix/lse_good.npy" "$dir/lse.npy" ;;
  shape) cp "$fix/o_shape.npy" "$dir/o.npy"; cp "$fix/lse_good.npy" "$dir/lse.npy" ;;
  dtype) cp "$fix/o_f8.npy" "$dir/o.npy"; cp "$fix/lse_good.npy" "$dir/lse.npy" ;;
  truncated) cp "$fix/o_truncated.npy" "$dir/o.npy"; cp "$fix/lse_good.npy" "$dir/lse.npy" ;;
  missing) ;;
  no_lse) cp "$fix/o_good.npy" "$dir/o.npy" ;;
  hang) exec sleep 30 ;;
  straggler) sleep 30 & cp "$fix/o_good.npy" "$dir/o.npy"; cp "$fix/lse_good.npy" "$dir/lse.npy" ;;
  fail) echo 'kernel exploded' >&2; exit 3 ;;
  segv) kill -SEGV $$ ;;
  decline) exit 77 ;;
esac
exit 0
)";
  }
  static void TearDownTestSuite() { fs::remove_all(fix_); }
  static CoreShape shape() { return {1, 2, 1, 3, 4, 5, 5}; }
  static std::string command(const std::string& mode) { return "/bin/sh " + (fix_ / "prog.sh").string() + " " + mode; }
  static KernelRun run(const std::string& mode, double limit_s = 5.0) {
    auto k = attach_program(command(mode), 5.0);
    const Case c = core_case(shape(), MaskKind::none, 400);
    return k->run(receive(c, k->declaration()), RunOptions{true, limit_s, 0});
  }
  static fs::path fix_;
};
fs::path Programs::fix_;

#define EXPECT_RUN(run_, status_, part)                                                        \
  do {                                                                                         \
    const KernelRun r_ = (run_);                                                               \
    EXPECT_EQ(run_status_name(r_.status), std::string(run_status_name(status_))) << r_.detail; \
    EXPECT_TRUE(contains(r_.detail, part)) << "detail: " << r_.detail << "\nexpected: " << part; \
  } while (0)

TEST_F(Programs, GoodOutputIsReadAndTheFolderRemoved) {
  const KernelRun r = run("inputs");
  ASSERT_EQ(r.status, RunStatus::ok) << r.detail;
  EXPECT_EQ(r.out.shape, (std::vector<std::int64_t>{1, 2, 3, 5}));
  EXPECT_EQ(r.lse.shape, (std::vector<std::int64_t>{1, 2, 3}));
  std::string last;
  std::ifstream(fix_ / "last_dir") >> last;
  EXPECT_TRUE(contains(last, "headroom-run-")) << last;
  EXPECT_FALSE(fs::exists(last)) << "exchange folder left behind: " << last;
}

TEST_F(Programs, MalformedOutputsAreBadOutputNamingTheFile) {
  EXPECT_RUN(run("shape"), RunStatus::bad_output, "o.npy: shape [1,2,5,3], expected [1,2,3,5]");
  EXPECT_RUN(run("dtype"), RunStatus::bad_output, "o.npy: dtype '<f8', expected '<f4'");
  EXPECT_RUN(run("truncated"), RunStatus::bad_output, "o.npy: ");
  EXPECT_RUN(run("missing"), RunStatus::bad_output, "o.npy: not written");
  EXPECT_RUN(run("no_lse"), RunStatus::bad_output, "lse.npy: not written");
}

TEST_F(Programs, HangsCrashesAndRefusals) {
  const auto start = std::chrono::steady_clock::now();
  EXPECT_RUN(run("hang", 0.3), RunStatus::timeout, "time limit of 0.3 s");
  const double hang_s = std::chrono::duration<double>(std::chrono::steady_clock::now() - start).count();
  EXPECT_LT(hang_s, 3.0);
  EXPECT_RUN(run("fail"), RunStatus::crash, "exit code 3; stderr: kernel exploded");
  EXPECT_RUN(run("segv"), RunStatus::crash, "SIGSEGV");
  EXPECT_RUN(run("decline"), RunStatus::unsupported, "77");
  // A background process holding the pipes open is killed and reported, not waited for
  // (named "sleep", or "sh" when the shell exits before its child has exec'd).
  const auto t0 = std::chrono::steady_clock::now();
  EXPECT_RUN(run("straggler"), RunStatus::stray_process, "left 1 process(es) it started running after the call returned");
  EXPECT_LT(std::chrono::duration<double>(std::chrono::steady_clock::now() - t0).count(), 3.0);
}

TEST_F(Programs, DescribeFailuresAreInputErrors) {
  const struct {
    const char* mode;
    const char* part;
    double limit_s;
  } cases[] = {{"describe_garbage", "not valid JSON", 10.0},
               {"describe_fails", "exit code 1; stderr: cannot start: no GPU", 10.0},
               {"describe_hangs", "time limit of 0.5 s", 0.5}};
  for (auto [mode, part, limit_s] : cases) {
    try {
      attach_program(command(mode), limit_s);
      ADD_FAILURE() << mode << " accepted";
    } catch (const InputError& e) {
      EXPECT_TRUE(contains(e.file(), command(mode))) << e.what();
      EXPECT_TRUE(contains(e.what(), part)) << e.what();
    }
  }
}

TEST_F(Programs, CrashingProgramsLeakNothing) {
  const testing::PrivateTempDir tmp;
  const int fds = count_fds();
  const int folders = count_exchange_folders();
  auto k = attach_program(command("segv"), 5.0);
  const Case c = core_case(shape(), MaskKind::none, 401);
  const ReceivedCase r = receive(c, k->declaration());
  for (int i = 0; i < 20; ++i) ASSERT_EQ(k->run(r, RunOptions{true, 5.0, 0}).status, RunStatus::crash);
  EXPECT_EQ(count_fds(), fds);
  EXPECT_EQ(count_exchange_folders(), folders);
  errno = 0;
  EXPECT_EQ(waitpid(-1, nullptr, WNOHANG), -1);
  EXPECT_EQ(errno, ECHILD);
}

// ---- declarations as JSON ----------------------------------------------------

TEST(AttachProgramDeclaration, RoundTrips) {
  KernelDeclaration d;
  d.name = "int8.kernel-1";
  d.description = "quantised";
  d.input_format = Format::int8;
  d.output_format = Format::binary16;
  d.q_quant = {Granularity::per_token, false};
  d.k_quant = {Granularity::per_channel, true};
  d.v_quant = {Granularity::per_head, false};
  d.mask_kinds = HR_MASK_CAUSAL_BOTTOM_RIGHT | HR_MASK_BIAS;
  d.masked_row = MaskedRowConvention::never_called;
  d.returns_lse = true;
  d.max_kv_len = 2048;
  const KernelDeclaration back = declaration_from_json(declaration_to_json(d), "rt");
  EXPECT_EQ(back.name, d.name);
  EXPECT_EQ(back.description, d.description);
  EXPECT_EQ(back.input_format, d.input_format);
  EXPECT_EQ(back.output_format, d.output_format);
  EXPECT_EQ(back.q_quant, d.q_quant);
  EXPECT_EQ(back.k_quant, d.k_quant);
  EXPECT_EQ(back.v_quant, d.v_quant);
  EXPECT_EQ(back.mask_kinds, d.mask_kinds);
  EXPECT_EQ(back.masked_row, d.masked_row);
  EXPECT_EQ(back.returns_lse, d.returns_lse);
  EXPECT_EQ(back.max_kv_len, d.max_kv_len);
  EXPECT_EQ(back.layouts, static_cast<std::uint32_t>(HR_LAYOUT_BHTD));
}

TEST(AttachProgramDeclaration, RefusesWhatItCannotTrust) {
  const std::string good = R"("protocol": 1, "name": "k", "level": "core", "input_format": "float32",
                              "output_format": "float32", "mask_kinds": ["none"], "masked_row": "zeros")";
  const struct {
    std::string json;
    const char* place;
  } bad[] = {
      {"[1, 2]", "describe output"},
      {"{" + good + ", \"mask_kind\": [\"none\"]}", "mask_kind"},  // a typo
      {R"({"protocol": 3, "name": "k"})", "protocol"},
      {R"({"protocol": 1})", "name"},
      {"{" + good + ", \"layouts\": [\"BTHD\"]}", "layouts"},
      {"{" + good + ", \"q_quant\": {\"granularity\": \"per_head\"}}", "q_quant"},
      {"{" + good + ", \"max_kv_len\": -4}", "max_kv_len"},
      {"{" + good + ", \"returns_lse\": 1}", "returns_lse"},
      {R"({"protocol": 1, "name": "k", "level": "core", "input_format": "float16x", "output_format": "float32",
           "mask_kinds": ["none"], "masked_row": "zeros"})", "input_format"},
      {R"({"protocol": 1, "name": "k", "level": "core", "input_format": "float32", "output_format": "int8",
           "mask_kinds": ["none"], "masked_row": "zeros"})", "output_format"},
      {R"({"protocol": 1, "name": "k", "level": "core", "input_format": "float32", "output_format": "float32",
           "mask_kinds": ["diagonal"], "masked_row": "zeros"})", "mask_kinds"},
  };
  for (const auto& b : bad) {
    try {
      declaration_from_json(b.json, "`my program`");
      ADD_FAILURE() << b.json << " accepted";
    } catch (const InputError& e) {
      EXPECT_EQ(e.file(), "`my program`");
      EXPECT_TRUE(contains(e.place(), b.place)) << e.what();
      EXPECT_FALSE(e.fix().empty());
    }
  }
  EXPECT_EQ(declaration_from_json("{" + good + "}", "ok").name, "k");
}

// What a SIGKILLed headroom leaves is removed by the next one; what a running
// process (or another naming) holds is not touched.
TEST(ExchangeFolders, AbandonedExchangeFoldersAreSwept) {
  testing::PrivateTempDir tmp;
  const fs::path t = fs::temp_directory_path();
  const pid_t child = fork();
  ASSERT_GE(child, 0);
  if (child == 0) _exit(0);
  ASSERT_EQ(waitpid(child, nullptr, 0), child);  // now a pid no process has
  const fs::path dead = t / ("headroom-run-" + std::to_string(child) + "-abcdef");
  const fs::path live = t / ("headroom-run-" + std::to_string(getppid()) + "-abcdef");
  const fs::path old_form = t / "headroom-run-abcdef";
  const fs::path elsewhere = t / "elsewhere";
  for (const auto& d : {dead / "sub", live, old_form, elsewhere}) fs::create_directories(d);
  std::ofstream(dead / "o.npy") << "x";
  std::ofstream(elsewhere / "keep") << "x";
  fs::create_directory_symlink(elsewhere, t / ("headroom-run-" + std::to_string(child) + "-link"));
  EXPECT_EQ(sweep_abandoned_exchange_folders(t), 1);
  EXPECT_FALSE(fs::exists(dead));
  EXPECT_TRUE(fs::exists(live));
  EXPECT_TRUE(fs::exists(old_form));
  EXPECT_TRUE(fs::exists(elsewhere / "keep")) << "a link named like a folder was followed";
}

}  // namespace
}  // namespace headroom
