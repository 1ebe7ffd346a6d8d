#pragma once
// Vector kernels of the scorer's fused loop (ErrorAccumulator::add_fused), of
// the group summary and of the scorer's magnitude pre-pass, chosen at run time (AVX-512 where the CPU has it; the
// scalar loops otherwise). The default build targets any x86-64: the kernels
// carry their own target attributes and run only after a CPU check.
//
// Exactness. For a symmetric group (scale s > 0, no zero point, stride 1, no
// NaN/inf input) the kernel computes, per element and in binary64 lanes, the
// very operations of the scalar loop: y = x * (1/s) for power-of-two s (the
// same value as x / s, see add_fused), otherwise y = x / s (vdivpd is the
// correctly rounded IEEE quotient); q = s * value; err = q - x; err * err;
// |err| / |x|. Vector add/mul/div/max are single IEEE operations (no FMA
// contraction, no flush-to-zero: MXCSR is left at its default), so every
// per-element term is bit-identical to the scalar one. The code index is the
// number of entries of thr' below y, where thr'_j = t_j, or the largest double
// below t_j where a tie at t_j goes up: for a double y, pred(t) < y <=> t <= y,
// so this is NearestTable::encode's count-below plus its tie step. It is counted
// over the same table padded with +inf (any count of a sorted table will do),
// each t < y decided by the sign of fl(t - y), which is exact for finite y: the
// caller takes the kernel only for s > 1e-250, where |x / s| < 1e289. Integer
// counts and maxima are therefore exactly those of the scalar loop. The sums
// are formed in 8 lanes: a group's squared error reduced per group, the sums of
// x, x^2, relative and top errors carried in lanes across the groups of a score
// chunk and reduced once per chunk, each in a fixed tree order. They differ from
// the scalar running sums only by rounding (far below 1e-12 relative) and do
// not depend on the thread count (chunks are fixed; their sums merge in order).
// The code histogram counts indices (packed 8-bit lane counters, widened before
// they can overflow); inputs that take the code of -0 are counted apart.
//
// The group summary kernels take float32 lanes: min, max and max |x| of float32
// values are exact, and a zero min or max (whose sign the scalar loop's order
// decides) or a NaN/inf sends the group to the scalar loop.
#include <cstddef>
#include <cstdint>
#include <vector>

#include "lobit/format/element_format.hpp"

namespace lobit::fused {

// The element table in the kernels' layout (formats of up to 16 values whose
// thresholds are exact in binary64).
struct KernelTable {
  alignas(64) double thr[16] = {};  // thr' (see above), padded with +inf
  alignas(64) double val[16] = {};  // decoded value by index
  Code code[16] = {};          // code by index
  int zero_index = -1;         // index of the value 0 (-1: none)
  bool has_neg_zero = false;   // y with the sign bit at zero_index takes neg_zero_code
  Code neg_zero_code = 0;
  bool ok = false;             // usable by the kernels
};
KernelTable make_kernel_table(const ElementFormat& code_element);

// The element table of formats of 17 to 256 values (8-bit minifloats and integers,
// codebooks) whose thresholds are exact in binary64. The kernel finds the index by a
// branch-free binary search of eight gathered comparisons (thr' padded with +inf to
// 256 entries, so the search counts the entries below y); everything else is the
// 16-value kernel's arithmetic, term for term.
struct WideKernelTable {
  std::vector<double> thr = std::vector<double>(256, 0.0);  // thr' (as above), padded with +inf
  std::vector<double> val = std::vector<double>(256, 0.0);  // decoded value by index
  std::vector<Code> code = std::vector<Code>(256, 0);
  int zero_index = -1;
  bool has_neg_zero = false;
  Code neg_zero_code = 0;
  bool ok = false;
};
WideKernelTable make_wide_kernel_table(const ElementFormat& code_element);

// Index counts of the wide kernel, one row of 256 per vector lane (so that the counts
// of neighbouring lanes do not wait on each other), and the inputs that take the code
// of -0 (counted under +0 in idx).
struct WideHist {
  std::vector<std::uint64_t> idx = std::vector<std::uint64_t>(8 * 256, 0);  // [lane][index]
  std::uint64_t neg_zero = 0;
};
void flush_wide_histogram(WideHist& h, const WideKernelTable& t, std::uint64_t* hist);

// Packed per-lane index counters carried from group to group.
struct HistState {
  alignas(64) std::uint64_t lo[8] = {};        // per lane, 8-bit counters of indices 0..7
  alignas(64) std::uint64_t hi[8] = {};        // and of indices 8..15
  alignas(64) std::uint64_t wide[16][8] = {};  // widened counters by index and lane
  alignas(64) std::uint64_t neg_zero[8] = {};  // inputs that take the code of -0 (counted under +0 in lo)
  int pending = 0;                             // vectors added to lo/hi since the last widening
};
// Adds the counted indices to hist (by code; -0 apart) and clears the state.
void flush_histogram(HistState& h, const KernelTable& t, std::uint64_t* hist);

// One group's squared error.
struct GroupSums {
  double err2 = 0;
};

// Lane partial sums and maxima carried from group to group (the squared error
// is reduced per group: the confidence interval needs it by group).
struct LaneSums {
  alignas(64) double sum_x[8] = {};
  alignas(64) double sum_x2[8] = {};
  alignas(64) double sum_rel[8] = {};
  alignas(64) double top_err2[8] = {};
  alignas(64) double max_abs_err[8] = {};
  alignas(64) double max_abs_x[8] = {};
  // Counts by lane (exact; integer sums in any order).
  alignas(64) std::uint64_t nonzero[8] = {};
  alignas(64) std::uint64_t zeroed[8] = {};
  alignas(64) std::uint64_t top_n[8] = {};
  alignas(64) std::uint64_t clipped[8] = {};
  bool pending = false;  // something added since the last flush
};
// Adds the lanes, each in the fixed order ((l0 + l4) + (l2 + l6)) + ((l1 + l5) + (l3 + l7)),
// to the totals (maxima: the larger) and clears them.
void flush_lanes(LaneSums& l, double& sum_x, double& sum_x2, double& sum_rel, double& top_err2, double& max_abs_err,
                 double& max_abs_x, std::uint64_t& nonzero, std::uint64_t& zeroed, std::uint64_t& top_n,
                 std::uint64_t& clipped);

// True where the CPU runs the AVX-512 kernels (and LOBIT_DISABLE_AVX512 is not set).
bool have_avx512();

// The fused loop over n contiguous finite inputs with scale s > 0 (inv = 1/s
// and pow2 as in add_fused). hist may be null (no histogram).
void group_avx512(const KernelTable& t, const float* x, std::size_t n, double s, double inv, bool pow2, double chi,
                  double clo, double top, GroupSums& out, LaneSums& lanes, HistState* hist);
// The same for a wide table.
void group_avx512_wide(const WideKernelTable& t, const float* x, std::size_t n, double s, double inv, bool pow2,
                       double chi, double clo, double top, GroupSums& out, LaneSums& lanes, WideHist* hist);

// Summary of n contiguous inputs (as lobit::summarize); returns false where the
// caller must take the scalar loop (a NaN/inf, or a zero min or max whose sign
// the scalar loop's order decides; or no AVX-512).
bool summarize_avx512(const float* x, std::size_t n, double& amax, double& min, double& max);

// The largest |x| of n contiguous inputs (exact: a float32 maximum); false where
// one is NaN or infinite, or the CPU lacks AVX-512.
bool amax_avx512(const float* x, std::size_t n, double& amax);

// Magnitude histogram of the scorer's pre-pass, inputs with |x| at or above a
// floor only: ++bins[bits(|x|) >> 16] for bits(|x|) >= lo. False (nothing done)
// where the CPU lacks AVX-512.
bool high_bins_avx512(const float* x, std::size_t n, std::uint32_t lo, std::uint64_t* bins);

}  // namespace lobit::fused
