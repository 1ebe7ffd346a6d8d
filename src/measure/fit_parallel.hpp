#pragma once
// Threads for the fit passes (internal to src/measure/fit*.cpp). Work is cut into
// pieces that do not depend on the thread count, and every floating sum is added in
// piece order, so results are the same on one thread or many.
#include <algorithm>
#include <cmath>
#include <condition_variable>
#include <cstddef>
#include <exception>
#include <functional>
#include <mutex>
#include <thread>
#include <vector>

namespace lobit::fit_detail {

inline int resolve_threads(int requested) {
  return requested > 0 ? requested : static_cast<int>(std::max(1u, std::thread::hardware_concurrency()));
}

// Neumaier's compensated sum (an improved Kahan sum).
struct CompensatedSum {
  double sum = 0, comp = 0;
  void add(double x) {
    const double t = sum + x;
    if (std::abs(sum) >= std::abs(x))
      comp += (sum - t) + x;
    else
      comp += (x - t) + sum;
    sum = t;
  }
  void add(const CompensatedSum& o) {
    add(o.sum);
    add(o.comp);
  }
  double value() const { return sum + comp; }
};

// A fixed set of threads that run one "wave" of tasks at a time: run(n, task) calls
// task(0 .. n-1) in parallel (task 0 on the calling thread) and returns when all are
// done; the exception of the lowest-numbered failing task is rethrown.
class WavePool {
 public:
  explicit WavePool(int threads) : n_threads_(std::max(1, threads)), errors_(static_cast<std::size_t>(n_threads_)) {
    for (int t = 1; t < n_threads_; ++t) workers_.emplace_back([this, t] { loop(t); });
  }
  ~WavePool() {
    {
      std::lock_guard lock(mu_);
      stop_ = true;
      ++generation_;
    }
    start_.notify_all();
    for (auto& w : workers_) w.join();
  }
  WavePool(const WavePool&) = delete;
  WavePool& operator=(const WavePool&) = delete;

  int threads() const { return n_threads_; }

  void run(int n, const std::function<void(int)>& task) {
    n = std::clamp(n, 0, n_threads_);
    if (n == 0) return;
    std::fill(errors_.begin(), errors_.end(), nullptr);
    {
      std::lock_guard lock(mu_);
      task_ = &task;
      active_ = n;
      pending_ = n - 1;
      ++generation_;
    }
    if (n > 1) start_.notify_all();
    try {
      task(0);
    } catch (...) {
      errors_[0] = std::current_exception();
    }
    {
      std::unique_lock lock(mu_);
      done_.wait(lock, [this] { return pending_ == 0; });
      task_ = nullptr;
    }
    for (auto& e : errors_)
      if (e) std::rethrow_exception(e);
  }

 private:
  void loop(int t) {
    std::size_t seen = 0;
    for (;;) {
      const std::function<void(int)>* task = nullptr;
      {
        std::unique_lock lock(mu_);
        start_.wait(lock, [&] { return generation_ != seen; });
        seen = generation_;
        if (stop_) return;
        if (t >= active_) continue;
        task = task_;
      }
      try {
        (*task)(t);
      } catch (...) {
        errors_[static_cast<std::size_t>(t)] = std::current_exception();
      }
      {
        std::lock_guard lock(mu_);
        --pending_;
      }
      done_.notify_one();
    }
  }

  int n_threads_;
  std::vector<std::exception_ptr> errors_;
  std::vector<std::thread> workers_;
  std::mutex mu_;
  std::condition_variable start_, done_;
  const std::function<void(int)>* task_ = nullptr;
  int active_ = 0, pending_ = 0;
  std::size_t generation_ = 0;
  bool stop_ = false;
};

// results[b] = fn(begin, end) for the blocks [b * block, min(n, (b + 1) * block)), computed
// on up to `threads` threads; the caller combines them in block order.
template <class T, class Fn>
std::vector<T> map_blocks(std::size_t n, std::size_t block, int threads, Fn&& fn) {
  const std::size_t nblocks = n == 0 ? 0 : (n + block - 1) / block;
  std::vector<T> out(nblocks);
  const int nt = static_cast<int>(std::min<std::size_t>(static_cast<std::size_t>(std::max(threads, 1)), nblocks));
  auto work = [&](int t) {
    for (std::size_t b = static_cast<std::size_t>(t); b < nblocks; b += static_cast<std::size_t>(nt))
      out[b] = fn(b * block, std::min(n, (b + 1) * block));
  };
  if (nt <= 1) {
    if (nblocks) work(0);
    return out;
  }
  std::vector<std::exception_ptr> errs(static_cast<std::size_t>(nt));
  std::vector<std::thread> pool;
  for (int t = 1; t < nt; ++t)
    pool.emplace_back([&, t] {
      try {
        work(t);
      } catch (...) {
        errs[static_cast<std::size_t>(t)] = std::current_exception();
      }
    });
  try {
    work(0);
  } catch (...) {
    errs[0] = std::current_exception();
  }
  for (auto& th : pool) th.join();
  for (auto& e : errs)
    if (e) std::rethrow_exception(e);
  return out;
}

}  // namespace lobit::fit_detail
