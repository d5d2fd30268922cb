//! The one way work is split across threads: cross-validation folds,
//! bootstrap draws, large kernels' column blocks, a backtest's refit dates
//! and its strategies all go through [`map_in_order`].
//!
//! **The determinism rule.** Items are handed out in contiguous runs, one run
//! per worker, and results come back in the order of the items. Each item's
//! result depends on the item alone: never on which worker ran it, on what
//! that worker ran before, or on how many workers there are (no shared
//! accumulator, no per-worker random state: a draw's generator is seeded by
//! the draw's number). So a fit or a backtest gives the same answer bit for
//! bit on one thread or on sixteen; the tests compare thread counts.

use std::any::Any;

/// A worker panicked; its payload, for the caller to map to its own error or
/// to resume unwinding with.
pub(crate) struct WorkerPanicked(pub(crate) Box<dyn Any + Send + 'static>);

/// `f` applied to every item, on up to `workers` scoped threads (in the
/// calling thread when `workers` ≤ 1 or there is at most one item), results
/// in item order (see the determinism rule above).
///
/// # Errors
/// [`WorkerPanicked`] when `f` panicked on a worker thread (a panic in the
/// calling thread unwinds as usual).
pub(crate) fn map_in_order<P, R, F>(items: Vec<P>, workers: usize, f: F) -> Result<Vec<R>, WorkerPanicked>
where
    P: Send,
    R: Send,
    F: Fn(P) -> R + Sync,
{
    let n = items.len();
    let workers = workers.clamp(1, n.max(1));
    if workers == 1 {
        return Ok(items.into_iter().map(f).collect());
    }
    let per = n.div_ceil(workers);
    let mut runs: Vec<Vec<P>> = Vec::with_capacity(workers);
    let mut rest = items.into_iter();
    loop {
        let run: Vec<P> = rest.by_ref().take(per).collect();
        if run.is_empty() {
            break;
        }
        runs.push(run);
    }
    std::thread::scope(|scope| {
        let f = &f;
        let handles: Vec<_> =
            runs.into_iter().map(|run| scope.spawn(move || run.into_iter().map(f).collect::<Vec<R>>())).collect();
        let mut out = Vec::with_capacity(n);
        let mut panicked = None;
        for h in handles {
            match h.join() {
                Ok(results) => out.extend(results),
                Err(payload) => panicked = panicked.or(Some(payload)),
            }
        }
        match panicked {
            None => Ok(out),
            Some(payload) => Err(WorkerPanicked(payload)),
        }
    })
}

/// Runs `background` on a scoped thread while `foreground` runs on this one;
/// `None` for the background result when it panicked (the caller can redo it).
pub(crate) fn beside<A, B>(background: impl FnOnce() -> B + Send, foreground: impl FnOnce() -> A) -> (A, Option<B>)
where
    B: Send,
{
    std::thread::scope(|scope| {
        let h = scope.spawn(background);
        let a = foreground();
        (a, h.join().ok())
    })
}

#[cfg(test)]
mod tests {
    use super::{beside, map_in_order};

    #[test]
    fn results_keep_item_order_for_every_worker_count() {
        let items: Vec<u64> = (0..37).collect();
        let once: Vec<u64> = items.iter().map(|i| i * i + 1).collect();
        for workers in [0, 1, 2, 3, 5, 8, 37, 100] {
            let got = map_in_order(items.clone(), workers, |i| i * i + 1).ok().unwrap();
            assert_eq!(got, once, "{workers} workers");
        }
        assert!(map_in_order(Vec::<u8>::new(), 4, |i| i).ok().unwrap().is_empty());
    }

    #[test]
    fn mutable_items_are_each_changed_once() {
        let mut columns = vec![vec![0u32; 3]; 10];
        let items: Vec<(usize, &mut Vec<u32>)> = columns.iter_mut().enumerate().collect();
        let sums = map_in_order(items, 3, |(i, col)| {
            col.iter_mut().for_each(|c| *c += i as u32);
            col.iter().sum::<u32>()
        })
        .ok()
        .unwrap();
        assert_eq!(sums, (0..10).map(|i| 3 * i).collect::<Vec<u32>>());
        assert!(columns.iter().enumerate().all(|(i, c)| c.iter().all(|&v| v == i as u32)));
    }

    #[test]
    fn a_worker_panic_is_returned_not_propagated() {
        let r = map_in_order((0..8).collect(), 2, |i: i32| {
            assert!(i != 6, "item six");
            i
        });
        let payload = r.expect_err("a worker panicked").0;
        let message = payload
            .downcast_ref::<&str>()
            .map(|m| (*m).to_owned())
            .or_else(|| payload.downcast_ref::<String>().cloned());
        assert!(message.is_some_and(|m| m.contains("item six")));
        let (a, b) = beside(|| 2 + 2, || "here");
        assert_eq!((a, b), ("here", Some(4)));
        let (_, lost) = beside(|| -> u8 { panic!("background") }, || ());
        assert!(lost.is_none());
    }
}
