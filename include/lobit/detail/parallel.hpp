#pragma once
// Fork-join over a fixed number of threads, for the scorers' chunk loops.
#include <exception>
#include <thread>
#include <vector>

namespace lobit::detail {

// Runs fn(0) on the calling thread and fn(1) .. fn(threads - 1) on threads of their own,
// waits for all of them, then rethrows the exception of the lowest-numbered call that
// failed. An exception never escapes a worker thread (which would end the process), and
// every thread is joined before anything is rethrown.
template <class Fn>
void run_threads(int threads, Fn&& fn) {
  const std::size_t n = threads > 1 ? static_cast<std::size_t>(threads) : 1;
  std::vector<std::exception_ptr> errors(n);
  auto guarded = [&](std::size_t t) {
    try {
      fn(static_cast<int>(t));
    } catch (...) {
      errors[t] = std::current_exception();
    }
  };
  std::vector<std::thread> pool;
  pool.reserve(n - 1);
  for (std::size_t t = 1; t < n; ++t) pool.emplace_back(guarded, t);
  guarded(0);
  for (auto& th : pool) th.join();
  for (auto& e : errors)
    if (e) std::rethrow_exception(e);
}

}  // namespace lobit::detail
