//! Work sharing. Work is cut into jobs fixed by the data, never by the thread count, and results
//! come back in job order, so the number of threads changes speed, never a result.
//!
//! `jobs` runs a list of tasks on a given number of threads. A worker that runs out of tasks
//! lends its core until the list is done, and a pass inside a still-running task (`chunks`)
//! borrows lent cores: the last long task of a grid does not run alone on one core while the
//! others idle. `lend` offers cores to the passes inside a single long computation.

use std::sync::Mutex;
use std::sync::atomic::{AtomicIsize, AtomicUsize, Ordering};

/// Cores lent and not borrowed. It may dip below zero for a moment when a lender takes its core
/// back while a borrower still runs; borrowing only happens when it is positive.
static SPARE: AtomicIsize = AtomicIsize::new(0);

/// Take up to `want` lent cores.
fn borrow(want: usize) -> usize {
    let mut got = 0;
    while got < want {
        let s = SPARE.load(Ordering::Acquire);
        if s <= 0 {
            break;
        }
        if SPARE
            .compare_exchange(s, s - 1, Ordering::AcqRel, Ordering::Acquire)
            .is_ok()
        {
            got += 1;
        }
    }
    got
}

fn give_back(n: usize) {
    SPARE.fetch_add(n as isize, Ordering::AcqRel);
}

/// Run `f` over `0..n` on `workers` threads (the calling thread among them); results in index
/// order. `done` is called by each worker when no index is left for it.
fn run<T: Send>(
    n: usize,
    workers: usize,
    f: &(impl Fn(usize) -> T + Sync),
    done: &(impl Fn() + Sync),
) -> Vec<T> {
    let slots: Mutex<Vec<Option<T>>> = Mutex::new((0..n).map(|_| None).collect());
    let next = AtomicUsize::new(0);
    let work = || {
        loop {
            let i = next.fetch_add(1, Ordering::Relaxed);
            if i >= n {
                break;
            }
            let out = f(i);
            if let Ok(mut g) = slots.lock() {
                g[i] = Some(out);
            }
        }
        done();
    };
    std::thread::scope(|s| {
        for _ in 1..workers {
            s.spawn(work);
        }
        work();
    });
    slots
        .into_inner()
        .unwrap_or_default()
        .into_iter()
        .flatten()
        .collect()
}

/// Run `f` over `0..n` on up to `threads` threads; results in index order (fewer than `n`
/// only if a worker panicked). Each worker lends its core once the tasks run out, until the
/// last task is done.
pub fn jobs<T: Send>(n: usize, threads: usize, f: impl Fn(usize) -> T + Sync) -> Vec<T> {
    let workers = threads.clamp(1, n.max(1));
    let lent = AtomicUsize::new(0);
    let out = run(n, workers, &f, &|| {
        lent.fetch_add(1, Ordering::Relaxed);
        give_back(1);
    });
    SPARE.fetch_sub(lent.load(Ordering::Relaxed) as isize, Ordering::AcqRel);
    out
}

/// Run `f` over `0..n` on the calling thread and any lent cores; results in index order.
pub fn chunks<T: Send>(n: usize, f: impl Fn(usize) -> T + Sync) -> Vec<T> {
    let got = if n > 1 { borrow(n - 1) } else { 0 };
    if got == 0 {
        return (0..n).map(f).collect();
    }
    // A helper returns its core as soon as it finds no job left; the calling thread's own core
    // was never borrowed.
    let caller = std::thread::current().id();
    run(n, got + 1, &f, &|| {
        if std::thread::current().id() != caller {
            give_back(1);
        }
    })
}

/// Offer `cores` more cores to the passes inside `f` (a long computation on the calling
/// thread, such as a refit after the grid).
pub fn lend<R>(cores: usize, f: impl FnOnce() -> R) -> R {
    give_back(cores);
    let out = f();
    SPARE.fetch_sub(cores as isize, Ordering::AcqRel);
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn results_come_back_in_order_with_any_number_of_cores() {
        let want: Vec<usize> = (0..50).map(|i| i * i).collect();
        for threads in [1, 2, 5] {
            assert_eq!(jobs(50, threads, |i| i * i), want);
            let nested = jobs(4, threads, |t| chunks(50, |i| i * i + t));
            for (t, v) in nested.iter().enumerate() {
                assert!(v.iter().zip(&want).all(|(a, b)| *a == b + t));
            }
            assert_eq!(lend(threads, || chunks(50, |i| i * i)), want);
        }
        assert!(jobs(0, 3, |i| i).is_empty());
    }
}
