// Native CPU kernels of the tower's step (see native.py for the math and the build).
//
// trail_dot:    h = sum_i <g~_i, E_i>, g~ = +-g (+ l2 w), float64 accumulation.
// dot_and_max:  the same sum and max_i |g_i| (NaN if any entry is NaN) in one read pass
//               (TowerSGD with momentum: E is the momentum buffer).
// adam_update:  w, m, v and the trail E of every tensor updated in one pass; optionally (the
//               one-step-lagged variant) the same pass also returns h of the old trails.
// sgd_update:   w, the momentum buffer, the trail E (and the kept gradient of plain SGD and
//               Nesterov) of every tensor updated in one pass.
//
// Work is split into fixed blocks of BLOCK elements per tensor, independent of the thread
// count; at::parallel_for hands out whole blocks. The dot product keeps one float64 partial
// sum per block and adds them in block order, so its result does not depend on the number
// of threads.
#include <torch/extension.h>

#include <ATen/Parallel.h>
#include <ATen/cpu/vec/vec.h>

#if defined(CPU_CAPABILITY_AVX2)
#include <immintrin.h>
#endif

#include <algorithm>
#include <cmath>
#include <type_traits>
#include <utility>
#include <vector>

namespace {

constexpr int64_t BLOCK = 1 << 15;

struct Block {
  int64_t tensor;
  int64_t begin;
  int64_t end;
};

std::vector<Block> blocks_of(const std::vector<at::Tensor>& ts) {
  std::vector<Block> out;
  for (int64_t i = 0; i < static_cast<int64_t>(ts.size()); ++i) {
    const int64_t n = ts[i].numel();
    for (int64_t b = 0; b < n; b += BLOCK) {
      out.push_back({i, b, std::min(n, b + BLOCK)});
    }
  }
  return out;
}

template <typename F>
void for_blocks(const std::vector<Block>& blocks, const F& f) {
  at::parallel_for(0, static_cast<int64_t>(blocks.size()), 1, [&](int64_t lo, int64_t hi) {
    for (int64_t k = lo; k < hi; ++k) f(k, blocks[k]);
  });
}

// The blocks' partial sums added in block order: the result does not depend on the thread count.
double in_block_order(const std::vector<double>& partial) {
  double total = 0.0;
  for (double x : partial) total += x;
  return total;
}

// max(a, b), NaN if either is NaN (std::max would drop a NaN in its first argument).
template <typename T>
T nan_max(T a, T b) {
  return (std::isnan(a) || std::isnan(b)) ? static_cast<T>(NAN) : std::max(a, b);
}

// The largest lane of a vector of maxima, NaN if any lane is.
template <typename T>
T largest_lane(const at::vec::Vectorized<T>& v) {
  T lanes[at::vec::Vectorized<T>::size()];
  v.store(lanes);
  T m = lanes[0];
  for (int64_t k = 1; k < at::vec::Vectorized<T>::size(); ++k) m = nan_max(m, lanes[k]);
  return m;
}

// ----------------------------------------------------------------------------- dot product

#if defined(CPU_CAPABILITY_AVX2)
// float32 with AVX2: 16 elements a round, widened to float64 (exact products), 4 accumulators.
template <bool MAXIMIZE, bool L2>
int64_t float_dot_avx2(const float* g, const float* e, const float* w, float l2, int64_t n, double* acc8) {
  __m256d acc[4] = {_mm256_setzero_pd(), _mm256_setzero_pd(), _mm256_setzero_pd(), _mm256_setzero_pd()};
  const __m256 l2v = _mm256_set1_ps(l2), sign = _mm256_set1_ps(-0.0f);
  int64_t j = 0;
  for (; j + 16 <= n; j += 16) {
    for (int h = 0; h < 2; ++h) {
      __m256 gv = _mm256_loadu_ps(g + j + 8 * h);
      if (MAXIMIZE) gv = _mm256_xor_ps(gv, sign);
      if (L2) gv = _mm256_add_ps(gv, _mm256_mul_ps(l2v, _mm256_loadu_ps(w + j + 8 * h)));
      const __m256 ev = _mm256_loadu_ps(e + j + 8 * h);
      const __m256d lo = _mm256_mul_pd(_mm256_cvtps_pd(_mm256_castps256_ps128(gv)),
                                       _mm256_cvtps_pd(_mm256_castps256_ps128(ev)));
      const __m256d hi = _mm256_mul_pd(_mm256_cvtps_pd(_mm256_extractf128_ps(gv, 1)),
                                       _mm256_cvtps_pd(_mm256_extractf128_ps(ev, 1)));
      acc[2 * h] = _mm256_add_pd(acc[2 * h], lo);
      acc[2 * h + 1] = _mm256_add_pd(acc[2 * h + 1], hi);
    }
  }
  double lanes[16];
  for (int k = 0; k < 4; ++k) _mm256_storeu_pd(lanes + 4 * k, acc[k]);
  for (int k = 0; k < 8; ++k) acc8[k] = lanes[k] + lanes[k + 8];
  return j;
}
#endif

// Exact products of T values in float64, 8 independent accumulators added in a fixed order.
template <typename T, bool MAXIMIZE, bool L2>
double block_dot(const T* g, const T* e, const T* w, T l2, int64_t n) {
  double acc[8] = {0, 0, 0, 0, 0, 0, 0, 0};
  int64_t j = 0;
#if defined(CPU_CAPABILITY_AVX2)
  if constexpr (std::is_same_v<T, float>) j = float_dot_avx2<MAXIMIZE, L2>(g, e, w, l2, n, acc);
#endif
  for (; j + 8 <= n; j += 8) {
    for (int k = 0; k < 8; ++k) {
      T gk = MAXIMIZE ? -g[j + k] : g[j + k];
      if (L2) gk = gk + l2 * w[j + k];
      acc[k] += static_cast<double>(gk) * static_cast<double>(e[j + k]);
    }
  }
  for (int k = 0; j < n; ++j, ++k) {
    T gk = MAXIMIZE ? -g[j] : g[j];
    if (L2) gk = gk + l2 * w[j];
    acc[k] += static_cast<double>(gk) * static_cast<double>(e[j]);
  }
  return ((acc[0] + acc[1]) + (acc[2] + acc[3])) + ((acc[4] + acc[5]) + (acc[6] + acc[7]));
}

template <typename T, bool MAXIMIZE, bool L2>
double dot_all(const std::vector<at::Tensor>& gs, const std::vector<at::Tensor>& es,
               const std::vector<at::Tensor>& ws, double l2) {
  const auto blocks = blocks_of(gs);
  std::vector<double> partial(blocks.size(), 0.0);
  for_blocks(blocks, [&](int64_t k, const Block& b) {
    const T* w = L2 ? ws[b.tensor].data_ptr<T>() + b.begin : nullptr;
    partial[k] = block_dot<T, MAXIMIZE, L2>(gs[b.tensor].data_ptr<T>() + b.begin,
                                            es[b.tensor].data_ptr<T>() + b.begin, w,
                                            static_cast<T>(l2), b.end - b.begin);
  });
  return in_block_order(partial);
}

template <typename T>
double dot_dispatch(const std::vector<at::Tensor>& gs, const std::vector<at::Tensor>& es,
                    const std::vector<at::Tensor>& ws, double l2, bool maximize) {
  const bool has_l2 = l2 != 0.0;
  if (maximize) {
    return has_l2 ? dot_all<T, true, true>(gs, es, ws, l2) : dot_all<T, true, false>(gs, es, ws, l2);
  }
  return has_l2 ? dot_all<T, false, true>(gs, es, ws, l2) : dot_all<T, false, false>(gs, es, ws, l2);
}

// Whether every entry is finite: x - x is 0 for a finite x and NaN for inf or NaN.
template <typename T>
bool all_finite_of(const std::vector<at::Tensor>& gs) {
  using V = at::vec::Vectorized<T>;
  const auto blocks = blocks_of(gs);
  std::vector<char> ok(blocks.size(), 1);
  for_blocks(blocks, [&](int64_t k, const Block& b) {
    const T* g = gs[b.tensor].data_ptr<T>();
    constexpr int64_t W = V::size();
    V a0(static_cast<T>(0)), a1 = a0, a2 = a0, a3 = a0;  // four chains: the adds' latency overlaps
    int64_t j = b.begin;
    for (; j + 4 * W <= b.end; j += 4 * W) {
      const V x0 = V::loadu(g + j), x1 = V::loadu(g + j + W), x2 = V::loadu(g + j + 2 * W);
      const V x3 = V::loadu(g + j + 3 * W);
      a0 = a0 + (x0 - x0), a1 = a1 + (x1 - x1), a2 = a2 + (x2 - x2), a3 = a3 + (x3 - x3);
    }
    for (; j < b.end; j += W) {
      const V x = V::loadu(g + j, std::min<int64_t>(W, b.end - j));
      a0 = a0 + (x - x);
    }
    const V acc = (a0 + a1) + (a2 + a3);
    T lanes[V::size()];
    acc.store(lanes);
    for (int64_t i = 0; i < V::size(); ++i) ok[k] = ok[k] && lanes[i] == static_cast<T>(0);
  });
  for (char x : ok) {
    if (!x) return false;
  }
  return true;
}

// The largest |entry| (NaN if any entry is NaN, inf if one is infinite): four chains of
// at::vec::maximum, which propagates NaN; zero-padded tails add nothing.
template <typename T>
double largest_of(const std::vector<at::Tensor>& gs) {
  using V = at::vec::Vectorized<T>;
  const auto blocks = blocks_of(gs);
  std::vector<T> partial(blocks.size(), static_cast<T>(0));
  for_blocks(blocks, [&](int64_t k, const Block& b) {
    const T* g = gs[b.tensor].data_ptr<T>();
    constexpr int64_t W = V::size();
    V a0(static_cast<T>(0)), a1 = a0, a2 = a0, a3 = a0;
    int64_t j = b.begin;
    for (; j + 4 * W <= b.end; j += 4 * W) {
      a0 = at::vec::maximum(a0, V::loadu(g + j).abs());
      a1 = at::vec::maximum(a1, V::loadu(g + j + W).abs());
      a2 = at::vec::maximum(a2, V::loadu(g + j + 2 * W).abs());
      a3 = at::vec::maximum(a3, V::loadu(g + j + 3 * W).abs());
    }
    for (; j < b.end; j += W) a0 = at::vec::maximum(a0, V::loadu(g + j, std::min<int64_t>(W, b.end - j)).abs());
    partial[k] = largest_lane(at::vec::maximum(at::vec::maximum(a0, a1), at::vec::maximum(a2, a3)));
  });
  double out = 0.0;
  for (T m : partial) out = nan_max(out, static_cast<double>(m));
  return out;
}

// ----------------------------------------------------------------------------- update

// float64 sum of exact products of two vectors (zero-padded tails add 0), 8 lanes in a fixed order.
template <typename T>
struct DotAcc {
  double lanes[8] = {0, 0, 0, 0, 0, 0, 0, 0};

  void add(const at::vec::Vectorized<T>& g, const at::vec::Vectorized<T>& e) {
    constexpr int64_t W = at::vec::Vectorized<T>::size();
    T gs[W], es[W];
    g.store(gs);
    e.store(es);
    for (int64_t k = 0; k < W; ++k) lanes[k % 8] += static_cast<double>(gs[k]) * static_cast<double>(es[k]);
  }

  double sum() const {
    return ((lanes[0] + lanes[1]) + (lanes[2] + lanes[3])) + ((lanes[4] + lanes[5]) + (lanes[6] + lanes[7]));
  }
};

#if defined(CPU_CAPABILITY_AVX2)
// float32 with AVX2: the same 8 lanes, kept in two registers.
template <>
struct DotAcc<float> {
  __m256d lo = _mm256_setzero_pd(), hi = _mm256_setzero_pd();

  void add(const at::vec::Vectorized<float>& g, const at::vec::Vectorized<float>& e) {
    const __m256 gv = g, ev = e;
    lo = _mm256_add_pd(lo, _mm256_mul_pd(_mm256_cvtps_pd(_mm256_castps256_ps128(gv)),
                                         _mm256_cvtps_pd(_mm256_castps256_ps128(ev))));
    hi = _mm256_add_pd(hi, _mm256_mul_pd(_mm256_cvtps_pd(_mm256_extractf128_ps(gv, 1)),
                                         _mm256_cvtps_pd(_mm256_extractf128_ps(ev, 1))));
  }

  double sum() const {
    double l[8];
    _mm256_storeu_pd(l, lo);
    _mm256_storeu_pd(l + 4, hi);
    return ((l[0] + l[1]) + (l[2] + l[3])) + ((l[4] + l[5]) + (l[6] + l[7]));
  }
};
#endif

// Per-tensor coefficients, computed in float64 and rounded once to T.
template <typename T>
struct Coef {
  T step_size;  // a / (1 - beta1^t)
  T bc2_sqrt;   // sqrt(1 - beta2^t)
  T decay;      // a * lambda (AdamW), else 0
};

struct Hyper {
  double beta1, beta2, eps, weight_decay, trail_weight;
  bool decoupled, maximize;
};

template <typename T>
Coef<T> coef_of(double a, double step, const Hyper& h) {
  const double decay = h.decoupled ? a * h.weight_decay : 0.0;
  return {static_cast<T>(a / (1.0 - std::pow(h.beta1, step))),
          static_cast<T>(std::sqrt(1.0 - std::pow(h.beta2, step))), static_cast<T>(decay)};
}

// Every constant of one tensor's update, as vectors, built once per block. The update loop reads
// them from registers: had it read the Hyper/Coef fields instead, each vector store (which may
// alias anything) would force them to be reloaded, converted and broadcast again, which made the
// update twice as slow as torch's fused Adam on cached data.
template <typename T>
struct Consts {
  using V = at::vec::Vectorized<T>;
  V one_minus_beta1, one_minus_beta2, beta2, bc2_sqrt, eps, step_size, l2, decay, keep_w, keep_e, omega;
  bool maximize, l2_on, decoupled_on;

  Consts(const Coef<T>& c, const Hyper& h)
      : one_minus_beta1(static_cast<T>(1.0 - h.beta1)),
        one_minus_beta2(static_cast<T>(1.0 - h.beta2)),
        beta2(static_cast<T>(h.beta2)),
        bc2_sqrt(c.bc2_sqrt),
        eps(static_cast<T>(h.eps)),
        step_size(c.step_size),
        l2(static_cast<T>(h.weight_decay)),
        decay(c.decay),
        keep_w(static_cast<T>(1) - c.decay),
        keep_e(static_cast<T>(1) - static_cast<T>(h.trail_weight)),
        omega(static_cast<T>(h.trail_weight)),
        maximize(h.maximize),
        l2_on(!h.decoupled && h.weight_decay != 0.0),
        decoupled_on(h.decoupled && h.weight_decay != 0.0) {}
};

// One vector of one tensor (FULL: W elements; else ``count`` elements, zero-padded), in
// torch.optim.Adam's order of operations. With ``acc`` (the lagged variant), also adds
// <g~, E> of the old trail to it.
template <typename T, bool FULL>
inline void update_vec(T* wp, const T* gp, T* mp, T* vp, T* ep, int64_t count, const Consts<T>& k,
                       DotAcc<T>* acc) {
  using V = at::vec::Vectorized<T>;
  const auto load = [count](const T* ptr) { return FULL ? V::loadu(ptr) : V::loadu(ptr, count); };
  V w = load(wp), g = load(gp), m = load(mp), v = load(vp), e = load(ep);
  if (k.maximize) g = g.neg();
  if (k.l2_on) g = g + k.l2 * w;
  if (acc != nullptr) acc->add(g, e);
  // Multiply-adds (fused where the ISA has them, as torch's lerp): with |g| < 1e-19 (float32),
  // g*g alone would be subnormal, which costs the CPU a slow path on every element.
  m = at::vec::fmadd(k.one_minus_beta1, g - m, m);
  v = at::vec::fmadd(k.one_minus_beta2 * g, g, v * k.beta2);
  const V denom = v.sqrt() / k.bc2_sqrt + k.eps;
  const V u = k.step_size * (m / denom);
  V delta = u;
  if (k.decoupled_on) {
    delta = u + k.decay * w;
    w = w * k.keep_w - u;
  } else {
    w = w - u;
  }
  e = e * k.keep_e + k.omega * delta;
  if (FULL) {
    w.store(wp), m.store(mp), v.store(vp), e.store(ep);
  } else {
    w.store(wp, count), m.store(mp, count), v.store(vp, count), e.store(ep, count);
  }
}

// Returns sum_i <g~_i, E_i> of the old trails when ``with_dot`` (block sums in block order), else 0.
template <typename T>
double update_all(std::vector<at::Tensor>& ws, const std::vector<at::Tensor>& gs, std::vector<at::Tensor>& ms,
                  std::vector<at::Tensor>& vs, std::vector<at::Tensor>& es, const std::vector<double>& steps,
                  double a, const Hyper& h, bool with_dot) {
  std::vector<Coef<T>> coefs;
  for (double s : steps) coefs.push_back(coef_of<T>(a, s, h));
  constexpr int64_t W = at::vec::Vectorized<T>::size();
  const auto blocks = blocks_of(ws);
  std::vector<double> partial(blocks.size(), 0.0);
  for_blocks(blocks, [&](int64_t k, const Block& b) {
    const int64_t i = b.tensor;
    T* w = ws[i].data_ptr<T>();
    const T* g = gs[i].data_ptr<T>();
    T *m = ms[i].data_ptr<T>(), *v = vs[i].data_ptr<T>(), *e = es[i].data_ptr<T>();
    DotAcc<T> acc;
    DotAcc<T>* accp = with_dot ? &acc : nullptr;
    const Consts<T> k_(coefs[i], h);
    int64_t j = b.begin;
    for (; j + W <= b.end; j += W) update_vec<T, true>(w + j, g + j, m + j, v + j, e + j, W, k_, accp);
    if (j < b.end) update_vec<T, false>(w + j, g + j, m + j, v + j, e + j, b.end - j, k_, accp);
    partial[k] = acc.sum();
  });
  return in_block_order(partial);
}

// ----------------------------------------------------------------------------- SGD update

struct SgdHyper {
  double momentum, dampening, weight_decay, trail_weight;
  bool maximize;
};

// The constants of the SGD update as vectors, built once per block (see Consts).
template <typename T>
struct SgdConsts {
  using V = at::vec::Vectorized<T>;
  V a, mu, one_minus_damp, l2, keep_e, omega;
  bool maximize, l2_on;

  SgdConsts(double step, const SgdHyper& h)
      : a(static_cast<T>(step)),
        mu(static_cast<T>(h.momentum)),
        one_minus_damp(static_cast<T>(1.0 - h.dampening)),
        l2(static_cast<T>(h.weight_decay)),
        keep_e(static_cast<T>(1) - static_cast<T>(h.trail_weight)),
        omega(static_cast<T>(h.trail_weight)),
        maximize(h.maximize),
        l2_on(h.weight_decay != 0.0) {}
};

// One vector of one tensor, in torch.optim.SGD's order of operations: g~ = +-g + l2 w;
// heavy ball b = mu b + (1 - damp) g~, d = b (Nesterov d = g~ + mu b); plain d = g~;
// w = w - a d, E = (1 - omega) E + omega (a d); KEEP stores g~ (the last gradient). With ``acc``
// (the lagged hypergradient), also adds <g~, E> of the old trail to it.
template <typename T, bool FULL, bool MOMENTUM, bool NESTEROV, bool KEEP>
inline void sgd_vec(T* wp, const T* gp, T* bp, T* ep, T* kp, int64_t count, const SgdConsts<T>& k,
                    DotAcc<T>* acc) {
  using V = at::vec::Vectorized<T>;
  const auto load = [count](const T* ptr) { return FULL ? V::loadu(ptr) : V::loadu(ptr, count); };
  const auto store = [count](const V& x, T* ptr) { FULL ? x.store(ptr) : x.store(ptr, count); };
  V w = load(wp), g = load(gp), e = load(ep);
  if (k.maximize) g = g.neg();
  if (k.l2_on) g = g + k.l2 * w;
  if (acc != nullptr) acc->add(g, e);
  V d = g;
  if constexpr (MOMENTUM) {
    const V b = load(bp) * k.mu + k.one_minus_damp * g;
    store(b, bp);
    d = NESTEROV ? g + k.mu * b : b;
  }
  if constexpr (KEEP) store(g, kp);
  const V step = k.a * d;
  store(w - step, wp);
  store(e * k.keep_e + k.omega * step, ep);
}

// Returns sum_i <g~_i, E_i> of the old trails when ``with_dot`` (block sums in block order), else 0.
template <typename T, bool MOMENTUM, bool NESTEROV, bool KEEP>
double sgd_all(std::vector<at::Tensor>& ws, const std::vector<at::Tensor>& gs, std::vector<at::Tensor>& bs,
               std::vector<at::Tensor>& es, std::vector<at::Tensor>& ks, double a, const SgdHyper& h,
               bool with_dot) {
  constexpr int64_t W = at::vec::Vectorized<T>::size();
  const auto blocks = blocks_of(ws);
  std::vector<double> partial(blocks.size(), 0.0);
  for_blocks(blocks, [&](int64_t bk, const Block& blk) {
    const int64_t i = blk.tensor;
    T* w = ws[i].data_ptr<T>();
    const T* g = gs[i].data_ptr<T>();
    T* b = MOMENTUM ? bs[i].data_ptr<T>() : nullptr;
    T* e = es[i].data_ptr<T>();
    T* kept = KEEP ? ks[i].data_ptr<T>() : nullptr;
    const auto at = [](T* ptr, int64_t j) { return ptr == nullptr ? nullptr : ptr + j; };
    const SgdConsts<T> k(a, h);
    DotAcc<T> acc;
    DotAcc<T>* accp = with_dot ? &acc : nullptr;
    int64_t j = blk.begin;
    for (; j + W <= blk.end; j += W) {
      sgd_vec<T, true, MOMENTUM, NESTEROV, KEEP>(w + j, g + j, at(b, j), e + j, at(kept, j), W, k, accp);
    }
    if (j < blk.end) {
      sgd_vec<T, false, MOMENTUM, NESTEROV, KEEP>(w + j, g + j, at(b, j), e + j, at(kept, j), blk.end - j, k,
                                                   accp);
    }
    partial[bk] = acc.sum();
  });
  return in_block_order(partial);
}

template <typename T>
double sgd_dispatch(std::vector<at::Tensor>& ws, const std::vector<at::Tensor>& gs, std::vector<at::Tensor>& bs,
                    std::vector<at::Tensor>& es, std::vector<at::Tensor>& ks, double a, const SgdHyper& h,
                    bool nesterov, bool with_dot) {
  if (h.momentum == 0.0) return sgd_all<T, false, false, true>(ws, gs, bs, es, ks, a, h, with_dot);
  if (nesterov) return sgd_all<T, true, true, true>(ws, gs, bs, es, ks, a, h, with_dot);
  return sgd_all<T, true, false, false>(ws, gs, bs, es, ks, a, h, with_dot);
}

// ----------------------------------------------------------------------------- dot and largest entry

// One block: sum <g~, e> (exact products, float64, 8 lanes in a fixed order) and max |g| of the
// raw gradient; at::vec::maximum propagates NaN, zero-padded tails add nothing to either.
template <typename T, bool MAXIMIZE, bool L2>
std::pair<double, T> block_dot_max(const T* g, const T* e, const T* w, T l2, int64_t n) {
  using V = at::vec::Vectorized<T>;
  constexpr int64_t W = V::size();
  DotAcc<T> acc;
  V mx(static_cast<T>(0));
  const V l2v(l2);
  for (int64_t j = 0; j < n; j += W) {
    const int64_t count = std::min(W, n - j);
    V x = count == W ? V::loadu(g + j) : V::loadu(g + j, count);
    const V ev = count == W ? V::loadu(e + j) : V::loadu(e + j, count);
    mx = at::vec::maximum(mx, x.abs());
    if (MAXIMIZE) x = x.neg();
    if (L2) x = x + l2v * (count == W ? V::loadu(w + j) : V::loadu(w + j, count));
    acc.add(x, ev);
  }
  return {acc.sum(), largest_lane(mx)};
}

template <typename T, bool MAXIMIZE, bool L2>
std::pair<double, double> dot_max_all(const std::vector<at::Tensor>& gs, const std::vector<at::Tensor>& es,
                                      const std::vector<at::Tensor>& ws, double l2) {
  const auto blocks = blocks_of(gs);
  std::vector<std::pair<double, T>> partial(blocks.size(), {0.0, static_cast<T>(0)});
  for_blocks(blocks, [&](int64_t k, const Block& b) {
    const T* w = L2 ? ws[b.tensor].data_ptr<T>() + b.begin : nullptr;
    partial[k] = block_dot_max<T, MAXIMIZE, L2>(gs[b.tensor].data_ptr<T>() + b.begin,
                                                es[b.tensor].data_ptr<T>() + b.begin, w,
                                                static_cast<T>(l2), b.end - b.begin);
  });
  double total = 0.0, largest = 0.0;
  for (const auto& [dot, m] : partial) {  // block order: independent of the thread count
    total += dot;
    largest = nan_max(largest, static_cast<double>(m));
  }
  return {total, largest};
}

template <typename T>
std::pair<double, double> dot_max_dispatch(const std::vector<at::Tensor>& gs, const std::vector<at::Tensor>& es,
                                           const std::vector<at::Tensor>& ws, double l2, bool maximize) {
  const bool has_l2 = l2 != 0.0;
  if (maximize) {
    return has_l2 ? dot_max_all<T, true, true>(gs, es, ws, l2) : dot_max_all<T, true, false>(gs, es, ws, l2);
  }
  return has_l2 ? dot_max_all<T, false, true>(gs, es, ws, l2) : dot_max_all<T, false, false>(gs, es, ws, l2);
}

// ----------------------------------------------------------------------------- checks

void check_lists(const std::vector<at::Tensor>& ref, const std::vector<std::vector<at::Tensor>>& others) {
  TORCH_CHECK(!ref.empty(), "stepsize_tower native kernel: empty tensor list");
  const auto dtype = ref[0].scalar_type();
  TORCH_CHECK(dtype == at::kFloat || dtype == at::kDouble,
              "stepsize_tower native kernel: float32 or float64 tensors only, got ", dtype);
  for (const auto& list : others) {
    TORCH_CHECK(list.size() == ref.size(), "stepsize_tower native kernel: tensor lists differ in length (",
                list.size(), " vs ", ref.size(), ")");
  }
  for (size_t i = 0; i < ref.size(); ++i) {
    for (const auto& list : others) {
      for (const auto* t : {&ref[i], &list[i]}) {
        TORCH_CHECK(t->device().is_cpu() && t->layout() == at::kStrided && t->is_contiguous(),
                    "stepsize_tower native kernel: tensor ", i, " must be a dense contiguous CPU tensor");
        TORCH_CHECK(t->scalar_type() == dtype, "stepsize_tower native kernel: tensor ", i, " has dtype ",
                    t->scalar_type(), ", expected ", dtype);
      }
      TORCH_CHECK(list[i].numel() == ref[i].numel(), "stepsize_tower native kernel: tensor ", i,
                  " has ", list[i].numel(), " elements, expected ", ref[i].numel());
    }
  }
}

// Whether the kernels take these lists (the checks of check_lists, answered instead of raised):
// one float32/float64 dtype, dense contiguous CPU tensors, others[k][i] shaped like ref[i].
bool compatible(const std::vector<at::Tensor>& ref, const std::vector<std::vector<at::Tensor>>& others) {
  if (ref.empty()) return false;
  const auto dtype = ref[0].scalar_type();
  if (dtype != at::kFloat && dtype != at::kDouble) return false;
  const auto fits = [dtype](const at::Tensor& t) {
    return t.device().is_cpu() && t.layout() == at::kStrided && t.scalar_type() == dtype && t.is_contiguous();
  };
  for (const auto& list : others) {
    if (list.size() != ref.size()) return false;
  }
  for (size_t i = 0; i < ref.size(); ++i) {
    if (!fits(ref[i])) return false;
    for (const auto& list : others) {
      if (!fits(list[i]) || list[i].sizes() != ref[i].sizes()) return false;
    }
  }
  return true;
}

// Each tensor's step count after this step: read from (and, with ``increment``, first advanced
// in) its 0-dim CPU count tensor, as torch's fused Adam advances ``state["step"]``.
std::vector<double> step_counts(std::vector<at::Tensor>& steps, bool increment) {
  std::vector<double> out;
  out.reserve(steps.size());
  for (auto& t : steps) {
    TORCH_CHECK(t.numel() == 1 && t.device().is_cpu(), "stepsize_tower native kernel: step counts must be ",
                "one-element CPU tensors");
    if (increment) t.add_(1);
    out.push_back(t.item<double>());
  }
  return out;
}

// ----------------------------------------------------------------------------- entry points

at::Tensor trail_dot(const std::vector<at::Tensor>& grads, const std::vector<at::Tensor>& trails,
                     const std::vector<at::Tensor>& params, double l2, bool maximize) {
  check_lists(grads, {trails, l2 != 0.0 ? params : grads});
  const auto& ws = l2 != 0.0 ? params : grads;
  const double h = grads[0].scalar_type() == at::kFloat ? dot_dispatch<float>(grads, trails, ws, l2, maximize)
                                                         : dot_dispatch<double>(grads, trails, ws, l2, maximize);
  return at::scalar_tensor(h, at::TensorOptions().dtype(at::kDouble));
}

std::pair<double, double> dot_and_max(const std::vector<at::Tensor>& grads, const std::vector<at::Tensor>& others,
                                      const std::vector<at::Tensor>& params, double l2, bool maximize) {
  check_lists(grads, {others, l2 != 0.0 ? params : grads});
  const auto& ws = l2 != 0.0 ? params : grads;
  return grads[0].scalar_type() == at::kFloat ? dot_max_dispatch<float>(grads, others, ws, l2, maximize)
                                               : dot_max_dispatch<double>(grads, others, ws, l2, maximize);
}

double adam_update(std::vector<at::Tensor> params, const std::vector<at::Tensor>& grads,
                 std::vector<at::Tensor> exp_avgs, std::vector<at::Tensor> exp_avg_sqs,
                 std::vector<at::Tensor> trails, std::vector<at::Tensor> step_tensors, bool increment, double a,
                 double beta1, double beta2, double eps, double weight_decay, bool decoupled, bool maximize,
                 double trail_weight, bool with_dot) {
  check_lists(params, {grads, exp_avgs, exp_avg_sqs, trails});
  TORCH_CHECK(step_tensors.size() == params.size(), "stepsize_tower native kernel: ", step_tensors.size(),
              " step counts for ", params.size(), " tensors");
  const std::vector<double> steps = step_counts(step_tensors, increment);
  const Hyper h{beta1, beta2, eps, weight_decay, trail_weight, decoupled, maximize};
  if (params[0].scalar_type() == at::kFloat) {
    return update_all<float>(params, grads, exp_avgs, exp_avg_sqs, trails, steps, a, h, with_dot);
  }
  return update_all<double>(params, grads, exp_avgs, exp_avg_sqs, trails, steps, a, h, with_dot);
}

double sgd_update(std::vector<at::Tensor> params, const std::vector<at::Tensor>& grads,
                  std::vector<at::Tensor> buffers, std::vector<at::Tensor> trails, std::vector<at::Tensor> kept,
                  double a, double momentum, double dampening, double weight_decay, bool nesterov, bool maximize,
                  double trail_weight, bool with_dot) {
  const bool heavy = momentum != 0.0, keep = momentum == 0.0 || nesterov;
  check_lists(params, {grads, trails, heavy ? buffers : grads, keep ? kept : grads});
  const SgdHyper h{momentum, dampening, weight_decay, trail_weight, maximize};
  if (params[0].scalar_type() == at::kFloat) {
    return sgd_dispatch<float>(params, grads, buffers, trails, kept, a, h, nesterov, with_dot);
  }
  return sgd_dispatch<double>(params, grads, buffers, trails, kept, a, h, nesterov, with_dot);
}

double largest(const std::vector<at::Tensor>& grads) {
  check_lists(grads, {grads});
  return grads[0].scalar_type() == at::kFloat ? largest_of<float>(grads) : largest_of<double>(grads);
}

bool all_finite(const std::vector<at::Tensor>& grads) {
  check_lists(grads, {grads});
  return grads[0].scalar_type() == at::kFloat ? all_finite_of<float>(grads) : all_finite_of<double>(grads);
}

}  // namespace

PYBIND11_MODULE(TORCH_EXTENSION_NAME, mod) {
  mod.def("trail_dot", &trail_dot, "sum_i <g~_i, E_i> in float64 (deterministic block order)");
  mod.def("dot_and_max", &dot_and_max, "(sum_i <g~_i, E_i> in float64, max |g|) in one read pass");
  mod.def("compatible", &compatible, "whether the kernels take these tensor lists");
  mod.def("all_finite", &all_finite, "whether every entry of the tensors is finite (one read pass)");
  mod.def("sgd_update", &sgd_update,
          "SGD step (heavy ball, Nesterov or plain) with the trail update and the kept gradient, one pass; "
          "with_dot: also sum_i <g~_i, E_i> (old trails)");
  mod.def("largest", &largest, "max_i |g_i| (NaN if any entry is NaN) in one read pass");
  mod.def("adam_update", &adam_update,
          "Adam/AdamW step with the trail update, one pass (increment: advance the step counts first); "
          "with_dot: also sum_i <g~_i, E_i> (old trails)");
}
