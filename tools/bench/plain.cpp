// headroom bench — the plain float64 baselines (see plain.h).
#include "plain.h"

#include <algorithm>
#include <cmath>
#include <cstdint>
#include <thread>
#include <vector>

namespace bench {
namespace {

std::int64_t pad4(std::int64_t n) { return (n + 3) / 4 * 4; }

// Calls fn(i) for i in [0, n) on `threads` threads, in contiguous slices.
template <class Fn>
void split(std::int64_t n, unsigned threads, Fn fn) {
  const auto t = static_cast<std::int64_t>(std::max(1u, threads));
  std::vector<std::thread> pool;
  for (std::int64_t w = 1; w < t; ++w)
    pool.emplace_back([&, w] {
      for (std::int64_t i = n * w / t; i < n * (w + 1) / t; ++i) fn(i);
    });
  for (std::int64_t i = 0; i < n / t; ++i) fn(i);
  for (auto& th : pool) th.join();
}

namespace avx2 {
#if (defined(__x86_64__) || defined(__i386__)) && (defined(__GNUC__) || defined(__clang__))
#define BENCH_HAVE_AVX2 1
#if defined(__clang__)
#pragma clang attribute push(__attribute__((target("avx2,fma"))), apply_to = function)
#else
#pragma GCC push_options
#pragma GCC target("avx2,fma")
#endif
constexpr int kVecBytes = 32;
#include "plain_loops.inc"
#if defined(__clang__)
#pragma clang attribute pop
#else
#pragma GCC pop_options
#endif
#endif
}  // namespace avx2

namespace base {
constexpr int kVecBytes = 16;
#include "plain_loops.inc"
}  // namespace base

bool use_avx2() {
#ifdef BENCH_HAVE_AVX2
  return __builtin_cpu_supports("avx2") && __builtin_cpu_supports("fma");
#else
  return false;
#endif
}

void row(const double* q, const double* kt, const double* v, std::int64_t tk, std::int64_t tk_pad, std::int64_t dk,
         std::int64_t dv_pad, double scale, double* z, double* o) {
#ifdef BENCH_HAVE_AVX2
  if (use_avx2()) return avx2::attention_row(q, kt, v, tk, tk_pad, dk, dv_pad, scale, z, o);
#endif
  base::attention_row(q, kt, v, tk, tk_pad, dk, dv_pad, scale, z, o);
}

void axpy(double x, const double* w, double* y, std::int64_t n) {
#ifdef BENCH_HAVE_AVX2
  if (use_avx2()) return avx2::axpy(x, w, y, n);
#endif
  base::axpy(x, w, y, n);
}

void backward_row(const double* q, const double* d_o, const double* kt, const double* kr, const double* vt,
                  std::int64_t tk, std::int64_t dk, std::int64_t dv, double scale, double* z, double* dp, double* dq,
                  double* dk_acc, double* dv_acc) {
#ifdef BENCH_HAVE_AVX2
  if (use_avx2())
    return avx2::backward_row(q, d_o, kt, kr, vt, tk, pad4(tk), dk, pad4(dk), dv, pad4(dv), scale, z, dp, dq, dk_acc,
                              dv_acc);
#endif
  base::backward_row(q, d_o, kt, kr, vt, tk, pad4(tk), dk, pad4(dk), dv, pad4(dv), scale, z, dp, dq, dk_acc, dv_acc);
}

// Rows [rows][cols] of `x` padded with zeros to [rows][pad4(cols)].
std::vector<double> padded(const double* x, std::int64_t rows, std::int64_t cols) {
  const std::int64_t cp = pad4(cols);
  std::vector<double> out(static_cast<std::size_t>(rows * cp), 0.0);
  for (std::int64_t r = 0; r < rows; ++r) std::copy_n(x + r * cols, cols, &out[static_cast<std::size_t>(r * cp)]);
  return out;
}

// Keys transposed [dk][tk_pad] and values padded [tk][dv_pad] of one head,
// from rows `stride` doubles apart starting at column `col`.
void lay_out(const double* k, const double* v, std::int64_t stride_k, std::int64_t stride_v, std::int64_t tk,
             std::int64_t dk, std::int64_t dv, std::vector<double>& kt, std::vector<double>& vp) {
  const std::int64_t tk_pad = pad4(tk), dv_pad = pad4(dv);
  kt.assign(static_cast<std::size_t>(dk * tk_pad), 0.0);
  vp.assign(static_cast<std::size_t>(tk * dv_pad), 0.0);
  for (std::int64_t j = 0; j < tk; ++j) {
    for (std::int64_t c = 0; c < dk; ++c) kt[static_cast<std::size_t>(c * tk_pad + j)] = k[j * stride_k + c];
    for (std::int64_t d = 0; d < dv; ++d) vp[static_cast<std::size_t>(j * dv_pad + d)] = v[j * stride_v + d];
  }
}

// rows × cols = x [rows, n] · w [n, cols] + bias, cols padded to 4 in `out`.
void project(const std::vector<double>& x, std::int64_t rows, std::int64_t n, const headroom::Tensor& w,
             const headroom::Tensor& bias, unsigned threads, std::vector<double>& out, std::int64_t& cols_pad) {
  const std::int64_t cols = w.shape[1];
  cols_pad = pad4(cols);
  std::vector<double> wp(static_cast<std::size_t>(n * cols_pad), 0.0);
  for (std::int64_t m = 0; m < n; ++m)
    std::copy_n(&w.values[static_cast<std::size_t>(m * cols)], cols, &wp[static_cast<std::size_t>(m * cols_pad)]);
  out.assign(static_cast<std::size_t>(rows * cols_pad), 0.0);
  split(rows, threads, [&](std::int64_t t) {
    double* y = &out[static_cast<std::size_t>(t * cols_pad)];
    if (!bias.values.empty()) std::copy(bias.values.begin(), bias.values.end(), y);
    for (std::int64_t m = 0; m < n; ++m) axpy(x[static_cast<std::size_t>(t * n + m)], &wp[static_cast<std::size_t>(m * cols_pad)], y, cols_pad);
  });
}

}  // namespace

const char* plain_isa() { return use_avx2() ? "avx2+fma" : "baseline"; }

void plain_core(const headroom::CoreProblem& p, const headroom::CoreInputs& in, unsigned threads,
                std::vector<double>& out) {
  const auto& s = p.shape;
  const std::int64_t tq = s.q_len, tk = s.kv_len, dk = s.key_dim, dv = s.value_dim;
  std::vector<double> kt, vp;
  lay_out(in.k.values.data(), in.v.values.data(), dk, dv, tk, dk, dv, kt, vp);
  const std::int64_t dv_pad = pad4(dv);
  std::vector<double> o(static_cast<std::size_t>(tq * dv_pad));
  split(tq, threads, [&](std::int64_t i) {
    thread_local std::vector<double> zz;
    zz.resize(static_cast<std::size_t>(pad4(tk)));
    row(&in.q.values[static_cast<std::size_t>(i * dk)], kt.data(), vp.data(), tk, pad4(tk), dk, dv_pad, p.scale,
        zz.data(), &o[static_cast<std::size_t>(i * dv_pad)]);
  });
  out.resize(static_cast<std::size_t>(tq * dv));
  for (std::int64_t i = 0; i < tq; ++i)
    std::copy_n(&o[static_cast<std::size_t>(i * dv_pad)], dv, &out[static_cast<std::size_t>(i * dv)]);
}

void plain_backward(const headroom::CoreProblem& p, const headroom::CoreInputs& in, const headroom::Tensor& d_o,
                    unsigned threads, std::vector<double>& d_q, std::vector<double>& d_k, std::vector<double>& d_v) {
  const auto& s = p.shape;
  const std::int64_t tq = s.q_len, tk = s.kv_len, dk = s.key_dim, dv = s.value_dim;
  const std::int64_t dk_pad = pad4(dk), dv_pad = pad4(dv), tk_pad = pad4(tk);
  std::vector<double> kt, vt, unused;
  lay_out(in.k.values.data(), in.v.values.data(), dk, dv, tk, dk, dv, kt, unused);
  lay_out(in.v.values.data(), in.v.values.data(), dv, dv, tk, dv, dv, vt, unused);
  const std::vector<double> kr = padded(in.k.values.data(), tk, dk), qp = padded(in.q.values.data(), tq, dk),
                            dop = padded(d_o.values.data(), tq, dv);
  const auto t = static_cast<std::int64_t>(std::max(1u, threads));
  std::vector<double> dq(static_cast<std::size_t>(tq * dk_pad));
  std::vector<std::vector<double>> dk_part(static_cast<std::size_t>(t)), dv_part(static_cast<std::size_t>(t));
  std::vector<std::thread> pool;
  auto work = [&](std::int64_t w) {
    std::vector<double>& dka = dk_part[static_cast<std::size_t>(w)];
    std::vector<double>& dva = dv_part[static_cast<std::size_t>(w)];
    dka.assign(static_cast<std::size_t>(tk * dk_pad), 0.0);
    dva.assign(static_cast<std::size_t>(tk * dv_pad), 0.0);
    std::vector<double> z(static_cast<std::size_t>(tk_pad)), dp(static_cast<std::size_t>(tk_pad));
    for (std::int64_t i = tq * w / t; i < tq * (w + 1) / t; ++i)
      backward_row(&qp[static_cast<std::size_t>(i * dk_pad)], &dop[static_cast<std::size_t>(i * dv_pad)], kt.data(),
                   kr.data(), vt.data(), tk, dk, dv, p.scale, z.data(), dp.data(),
                   &dq[static_cast<std::size_t>(i * dk_pad)], dka.data(), dva.data());
  };
  for (std::int64_t w = 1; w < t; ++w) pool.emplace_back(work, w);
  work(0);
  for (auto& th : pool) th.join();
  for (std::int64_t w = 1; w < t; ++w) {
    for (std::size_t e = 0; e < dk_part[0].size(); ++e) dk_part[0][e] += dk_part[static_cast<std::size_t>(w)][e];
    for (std::size_t e = 0; e < dv_part[0].size(); ++e) dv_part[0][e] += dv_part[static_cast<std::size_t>(w)][e];
  }
  auto unpad = [](const std::vector<double>& x, std::int64_t rows, std::int64_t cols, std::vector<double>& out) {
    const std::int64_t cp = pad4(cols);
    out.resize(static_cast<std::size_t>(rows * cols));
    for (std::int64_t r = 0; r < rows; ++r)
      std::copy_n(&x[static_cast<std::size_t>(r * cp)], cols, &out[static_cast<std::size_t>(r * cols)]);
  };
  unpad(dq, tq, dk, d_q);
  unpad(dk_part[0], tk, dk, d_k);
  unpad(dv_part[0], tk, dv, d_v);
}

void plain_block(const headroom::BlockProblem& p, const headroom::BlockInputs& in, unsigned threads,
                 std::vector<double>& out) {
  const auto& s = p.shape;
  const std::int64_t dm = s.model_dim, tq = s.q_len, tk = s.kv_len, dk = s.key_dim, dv = s.value_dim;
  std::int64_t qc = 0, kc = 0, vc = 0, oc = 0;
  std::vector<double> q, k, v;
  project(in.x_q.values, tq, dm, in.w_q, in.b_q, threads, q, qc);
  project(in.x_kv.values, tk, dm, in.w_k, in.b_k, threads, k, kc);
  project(in.x_kv.values, tk, dm, in.w_v, in.b_v, threads, v, vc);
  const std::int64_t cat = s.q_heads * dv, dv_pad = pad4(dv);
  std::vector<double> concat(static_cast<std::size_t>(tq * cat));
  const std::int64_t group = s.q_heads / s.kv_heads;
  for (std::int64_t h = 0; h < s.q_heads; ++h) {
    const std::int64_t g = h / group;
    std::vector<double> kt, vp;
    lay_out(&k[static_cast<std::size_t>(g * dk)], &v[static_cast<std::size_t>(g * dv)], kc, vc, tk, dk, dv, kt, vp);
    split(tq, threads, [&](std::int64_t i) {
      thread_local std::vector<double> zz, oo;
      zz.resize(static_cast<std::size_t>(pad4(tk)));
      oo.resize(static_cast<std::size_t>(dv_pad));
      row(&q[static_cast<std::size_t>(i * qc + h * dk)], kt.data(), vp.data(), tk, pad4(tk), dk, dv_pad, p.scale,
          zz.data(), oo.data());
      std::copy_n(oo.data(), dv, &concat[static_cast<std::size_t>(i * cat + h * dv)]);
    });
  }
  std::vector<double> y;
  project(concat, tq, cat, in.w_o, in.b_o, threads, y, oc);
  out.resize(static_cast<std::size_t>(tq * dm));
  for (std::int64_t i = 0; i < tq; ++i)
    std::copy_n(&y[static_cast<std::size_t>(i * oc)], dm, &out[static_cast<std::size_t>(i * dm)]);
}

}  // namespace bench
