// Folding an N-D stored tensor into the storage-order matrix that scoring reads.
#include "lobit/io/tensor_view.hpp"

#include <fmt/format.h>
#include <fmt/ranges.h>

#include <algorithm>

#include "lobit/error.hpp"

namespace lobit::io {
namespace {

std::string axes_text(const std::vector<int>& r) {
  if (r.empty()) return "no axis";
  bool run = r.size() > 1;
  for (std::size_t i = 1; i < r.size(); ++i) run = run && r[i] == r[i - 1] + 1;
  if (r.size() == 1) return fmt::format("axis {}", r[0]);
  if (run) return fmt::format("axes {}-{}", r.front(), r.back());
  std::string s = "axes ";
  return s + fmt::format("{}", fmt::join(r, ","));
}

}  // namespace

MatrixView fold(const TensorInfo& t, const std::vector<int>& reduce_in) {
  const int rank = static_cast<int>(t.shape.size());
  MatrixView v;
  std::vector<int> reduce = reduce_in;
  std::sort(reduce.begin(), reduce.end());
  reduce.erase(std::unique(reduce.begin(), reduce.end()), reduce.end());
  for (int a : reduce)
    if (a < 0 || a >= std::max(rank, 1))
      throw usage_error(fmt::format("tensor \"{}\": axis {} is outside its shape {}", t.name, a, t.shape_text()),
                        t.file, "use an axis from 0 to rank - 1");
  if (rank <= 1) {
    v.rows = 1;
    v.cols = rank == 0 ? 1 : t.shape[0];
    v.axis = 1;
    v.reduce = rank == 0 ? std::vector<int>{} : std::vector<int>{0};
    v.text = rank == 0 ? "scalar" : fmt::format("axis 0 of {}", t.shape_text());
    return v;
  }
  // Logical axes from the slowest-varying to the fastest in storage; axes of length 1
  // go anywhere, so they are left out of the contiguity test.
  std::vector<int> mem;
  for (int k = 0; k < rank; ++k) mem.push_back(t.fortran_order ? rank - 1 - k : k);
  auto in_reduce = [&](int a) { return std::binary_search(reduce.begin(), reduce.end(), a); };
  std::vector<int> live;
  for (int a : mem)
    if (t.shape[static_cast<std::size_t>(a)] != 1 || in_reduce(a)) live.push_back(a);
  auto product = [&](auto pred) {
    std::uint64_t p = 1;
    for (int a = 0; a < rank; ++a)
      if (pred(a)) p *= t.shape[static_cast<std::size_t>(a)];
    return p;
  };
  (void)t.count();  // overflow check of the whole shape
  // The reduced axes as a run at the fast end (blocks along rows) or the slow end
  // (blocks down columns) of storage order.
  auto suffix_len = [&] {
    std::size_t k = 0;
    while (k < live.size() && in_reduce(live[live.size() - 1 - k])) ++k;
    return k;
  };
  auto prefix_len = [&] {
    std::size_t k = 0;
    while (k < live.size() && in_reduce(live[k])) ++k;
    return k;
  };
  std::size_t n_reduce_live = 0;
  for (int a : live) n_reduce_live += in_reduce(a);
  const std::size_t suf = suffix_len(), pre = prefix_len();
  std::vector<int> used;
  bool along_rows = true;
  if (suf == n_reduce_live) {
    used.assign(live.end() - static_cast<std::ptrdiff_t>(suf), live.end());
  } else if (pre == n_reduce_live) {
    used.assign(live.begin(), live.begin() + static_cast<std::ptrdiff_t>(pre));
    along_rows = false;
  } else {
    // Not contiguous in storage: take the larger of the two foldable runs.
    std::vector<int> s(live.end() - static_cast<std::ptrdiff_t>(suf), live.end());
    std::vector<int> p(live.begin(), live.begin() + static_cast<std::ptrdiff_t>(pre));
    auto size_of = [&](const std::vector<int>& axes) {
      std::uint64_t q = 1;
      for (int a : axes) q *= t.shape[static_cast<std::size_t>(a)];
      return q;
    };
    if (!s.empty() && (p.empty() || size_of(s) >= size_of(p))) {
      used = s;
    } else {
      used = p;
      along_rows = false;
    }
    v.exact = false;
  }
  std::sort(used.begin(), used.end());
  auto in_used = [&](int a) { return std::binary_search(used.begin(), used.end(), a); };
  const std::uint64_t red = product(in_used), rest = product([&](int a) { return !in_used(a); });
  if (along_rows) {
    v.rows = rest, v.cols = red, v.axis = 1;
  } else {
    v.rows = red, v.cols = rest, v.axis = 0;
  }
  if (used.empty()) {  // every requested axis has length 1 and none is reduced in practice
    v.rows = rest, v.cols = 1, v.axis = 1;
  }
  v.reduce = used;
  v.text = fmt::format("{} of {}{}", axes_text(used), t.shape_text(), t.fortran_order ? " (Fortran order)" : "");
  return v;
}

StoredTensorSource::StoredTensorSource(const Checkpoint& ckpt, std::size_t index, MatrixView view)
    : ckpt_(ckpt), index_(index), view_(std::move(view)) {}

void StoredTensorSource::fill_rows(std::uint64_t row0, std::uint64_t nrows, float* out) const {
  ckpt_.read_f32(index_, row0 * view_.cols, nrows * view_.cols, out);
}

std::string StoredTensorSource::name() const { return ckpt_.tensors().at(index_).name; }

}  // namespace lobit::io
