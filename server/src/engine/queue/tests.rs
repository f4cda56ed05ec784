//! The fair queue's behaviour: order within a lane, interleaving across lanes, shares by cost,
//! no starvation and no saving up, the bounds, shutdown, the wait estimate, and a stress run of
//! many pushing threads against one taking thread. Expected orders are worked out by hand from
//! the start tags (start = max(virtual time, the lane's last finish); finish = start + cost).

use std::sync::Arc;
use std::sync::atomic::{AtomicBool, AtomicUsize, Ordering};

use super::*;

/// A job: which tenant sent it, its number within that tenant, and its cost.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
struct J {
    lane: usize,
    n: u32,
    cost: u64,
}

impl Cost for J {
    fn cost(&self) -> u64 {
        self.cost
    }
}

fn j(lane: usize, n: u32, cost: u64) -> J {
    J { lane, n, cost }
}

fn queue(lanes: usize) -> FairQueue<J> {
    queue_with_burst(lanes, 0)
}

const ANY: Budget = Budget {
    cost: u64::MAX,
    jobs: usize::MAX,
};

fn one_at_a_time() -> Budget {
    Budget { cost: 1, jobs: 1 }
}

/// Labels like "a1" for lane 0's first job, "b3" for lane 1's third.
fn names(jobs: &[J]) -> Vec<String> {
    jobs.iter()
        .map(|j| format!("{}{}", (b'a' + j.lane as u8) as char, j.n))
        .collect()
}

fn push_all(q: &FairQueue<J>, jobs: impl IntoIterator<Item = J>) {
    for job in jobs {
        q.push(job.lane, job).unwrap();
    }
}

fn drain_one_by_one(q: &FairQueue<J>) -> Vec<J> {
    let mut out = Vec::new();
    loop {
        let batch = q.try_take(one_at_a_time());
        if batch.is_empty() {
            return out;
        }
        out.extend(batch);
    }
}

#[test]
fn one_lane_is_first_in_first_out_and_fills_a_batch_to_its_budget() {
    let q = queue(1);
    push_all(&q, (1..=5).map(|n| j(0, n, 3)));
    // Budget 8: 3 + 3 fit, a third would make 9.
    let first = q.try_take(Budget { cost: 8, jobs: 10 });
    assert_eq!(names(&first), ["a1", "a2"]);
    let rest = q.try_take(ANY);
    assert_eq!(names(&rest), ["a3", "a4", "a5"]);
    assert!(q.is_empty());
}

#[test]
fn tenants_queued_together_take_turns_job_by_job() {
    // Costs of 1, all queued at virtual time 0: a's tags 0..5, b's 0..2, c's 0. Equal tags go
    // in arrival order (a's, then b's, then c's were pushed).
    let q = queue(3);
    push_all(&q, (1..=6).map(|n| j(0, n, 1)));
    push_all(&q, (1..=3).map(|n| j(1, n, 1)));
    push_all(&q, (1..=1).map(|n| j(2, n, 1)));
    let order = drain_one_by_one(&q);
    assert_eq!(
        names(&order),
        ["a1", "b1", "c1", "a2", "b2", "a3", "b3", "a4", "a5", "a6"]
    );
}

#[test]
fn a_tenant_with_nothing_queued_goes_next_not_behind_the_backlog() {
    // a queued 500 jobs (tags 0..499). After four are taken the virtual time is 3; b's job gets
    // tag 3, ahead of a's 4 onwards, and goes out first in the next batch.
    let q = queue(2);
    push_all(&q, (1..=500).map(|n| j(0, n, 1)));
    let first = q.try_take(Budget { cost: 4, jobs: 100 });
    assert_eq!(names(&first), ["a1", "a2", "a3", "a4"]);
    q.push(1, j(1, 1, 1)).unwrap();
    let second = q.try_take(Budget { cost: 4, jobs: 100 });
    assert_eq!(names(&second), ["b1", "a5", "a6", "a7"]);
}

#[test]
fn a_light_tenant_goes_before_a_heavy_one_that_is_not_backlogged() {
    // a keeps one job queued behind the one being served (a heavy user within its quota); b
    // sends one now and then. b's tag is the virtual time, a's next is a's last finish: b first.
    let q = queue(2);
    push_all(&q, [j(0, 1, 4), j(0, 2, 4)]);
    assert_eq!(names(&q.try_take(Budget { cost: 4, jobs: 1 })), ["a1"]);
    q.push(1, j(1, 1, 4)).unwrap();
    q.push(0, j(0, 3, 4)).unwrap();
    let order = drain_one_by_one(&q);
    assert_eq!(names(&order), ["b1", "a2", "a3"]);
}

#[test]
fn a_tenant_that_pushes_again_right_after_each_answer_gets_its_share_not_more() {
    // b sends its next job as soon as the last one was taken (a closed loop of one client). Its
    // tags continue from its last finish, so a and b alternate.
    let q = queue(2);
    push_all(&q, (1..=20).map(|n| j(0, n, 1)));
    let mut order = Vec::new();
    let mut next_b = 1;
    for _ in 0..20 {
        if q.lane_len(1) == 0 {
            q.push(1, j(1, next_b, 1)).unwrap();
            next_b += 1;
        }
        order.extend(q.try_take(one_at_a_time()));
    }
    let a = order.iter().filter(|j| j.lane == 0).count();
    assert_eq!(a, 10, "{:?}", names(&order));
}

#[test]
fn shares_are_equal_by_cost_not_by_job_count() {
    // a sends jobs of 4 rows, b of 1 row; both always have work. Over 40 batches of 8 rows each
    // is served about half the rows: within the largest job of each other.
    let q = queue(2);
    push_all(&q, (1..=200).map(|n| j(0, n, 4)));
    push_all(&q, (1..=800).map(|n| j(1, n, 1)));
    let mut rows = [0u64; 2];
    for _ in 0..40 {
        for job in q.try_take(Budget { cost: 8, jobs: 100 }) {
            rows[job.lane] += job.cost;
        }
    }
    assert!(rows[0] + rows[1] >= 300, "rows served {rows:?}");
    assert!(rows[0].abs_diff(rows[1]) <= 4, "rows served {rows:?}");
}

/// A queue of `lanes` lanes with a burst of `burst`.
fn queue_with_burst(lanes: usize, burst: u64) -> FairQueue<J> {
    FairQueue::new(
        lanes,
        QueueLimits {
            total: 1000,
            per_lane: 1000,
            burst,
        },
    )
}

/// The history both idle-tenant tests start from: a's one job is served, then b's ten (tags
/// 0..9); the virtual time is 9 and a's last finish tag 1.
fn serve_a_once_then_ten_of_b(q: &FairQueue<J>) {
    q.push(0, j(0, 1, 1)).unwrap();
    assert_eq!(names(&q.try_take(ANY)), ["a1"]);
    push_all(q, (1..=10).map(|n| j(1, n, 1)));
    assert_eq!(q.try_take(ANY).len(), 10);
}

#[test]
fn without_a_burst_an_idle_tenant_saves_nothing_up() {
    // a's one job is served; then b's ten (tags 0..9) are, and the virtual time is 9. a's next
    // five start at 9, not at 1: they interleave with b's next five instead of all going first.
    let q = queue(2);
    serve_a_once_then_ten_of_b(&q);
    push_all(&q, (2..=6).map(|n| j(0, n, 1)));
    push_all(&q, (11..=15).map(|n| j(1, n, 1)));
    assert_eq!(
        names(&drain_one_by_one(&q)),
        [
            "a2", "a3", "b11", "a4", "b12", "a5", "b13", "a6", "b14", "b15"
        ]
    );
}

#[test]
fn an_idle_tenant_saves_up_to_its_burst_and_no_more() {
    // The same history with a burst of 3: the virtual time is 9, so a's next jobs start at
    // 9 - 3 = 6 (tags 6, 7, 8, 9, 10) and b's at 10: a's first four go before b's backlog, its
    // fifth (tag 10) ties with b11 and, pushed earlier, goes first too.
    let q = queue_with_burst(2, 3);
    serve_a_once_then_ten_of_b(&q);
    push_all(&q, (2..=8).map(|n| j(0, n, 1)));
    push_all(&q, (11..=15).map(|n| j(1, n, 1)));
    assert_eq!(
        names(&drain_one_by_one(&q)),
        [
            "a2", "a3", "a4", "a5", "a6", "b11", "a7", "b12", "a8", "b13", "b14", "b15"
        ]
    );
}

#[test]
fn a_light_tenants_clump_goes_before_a_floods_backlog_within_the_burst() {
    // b floods: 200 jobs of 4 rows queued, taken one 4-row batch at a time. a is light: three
    // 4-row requests arrive together. Plain fair queueing takes turns (a, b, a, b, a): a's last
    // request waits five batches. With a burst of 8 rows a's clump starts at the virtual time
    // minus 8 (tags V-8, V-4, V) and all three go before b's next.
    let batch = Budget { cost: 4, jobs: 100 };
    for (burst, expected) in [
        (0, vec!["a1", "b11", "a2", "b12", "a3"]),
        (8, vec!["a1", "a2", "a3", "b11", "b12"]),
    ] {
        let q = queue_with_burst(2, burst);
        push_all(&q, (1..=200).map(|n| j(1, n, 4)));
        for _ in 0..10 {
            q.try_take(batch);
        }
        push_all(&q, (1..=3).map(|n| j(0, n, 4)));
        let order: Vec<J> = (0..5).flat_map(|_| q.try_take(batch)).collect();
        assert_eq!(names(&order), expected, "burst {burst}");
    }
}

#[test]
fn a_tenant_that_never_idles_gains_nothing_from_the_burst() {
    // Both tenants always have work queued: the burst applies to neither (their last finish
    // tags are ahead of the virtual time), and they alternate exactly as without it.
    let q = queue_with_burst(2, 8);
    push_all(&q, (1..=50).map(|n| j(0, n, 1)));
    push_all(&q, (1..=50).map(|n| j(1, n, 1)));
    let order = drain_one_by_one(&q);
    let first_twenty: Vec<usize> = order.iter().take(20).map(|j| j.lane).collect();
    assert_eq!(first_twenty, [0, 1].repeat(10));
}

#[test]
fn a_large_job_goes_in_turn_and_its_tenant_waits_its_cost_before_the_next() {
    // a's first job costs 10 (tags 0 to 10), its second 1 (tag 10); b's twelve cost 1 (tags
    // 0..11). a's large job is not held back, but b then gets 10 rows before a's next.
    let q = queue(2);
    push_all(&q, [j(0, 1, 10), j(0, 2, 1)]);
    push_all(&q, (1..=12).map(|n| j(1, n, 1)));
    let expected: Vec<String> = ["a1"]
        .into_iter()
        .map(str::to_owned)
        .chain((1..=10).map(|n| format!("b{n}")))
        .chain(["a2", "b11", "b12"].map(str::to_owned))
        .collect();
    assert_eq!(names(&q.try_take(ANY)), expected);
}

#[test]
fn a_first_job_over_the_budget_is_taken_alone() {
    let q = queue(1);
    push_all(&q, [j(0, 1, 50), j(0, 2, 1)]);
    assert_eq!(names(&q.try_take(Budget { cost: 32, jobs: 10 })), ["a1"]);
    assert_eq!(names(&q.try_take(Budget { cost: 32, jobs: 10 })), ["a2"]);
}

#[test]
fn the_job_budget_caps_a_batch() {
    let q = queue(2);
    push_all(&q, (1..=5).map(|n| j(0, n, 10)));
    push_all(&q, (1..=5).map(|n| j(1, n, 10)));
    assert_eq!(
        q.try_take(Budget {
            cost: u64::MAX,
            jobs: 3
        })
        .len(),
        3
    );
    assert_eq!(q.len(), 7);
}

#[test]
fn shares_of_the_queue_fit_in_it_together() {
    // 256 jobs for 3 tenants: 85 each (255 in all); one tenant alone may use all 256.
    let three = QueueLimits::shared(256, 3);
    assert_eq!((three.total, three.per_lane), (256, 85));
    assert_eq!(QueueLimits::shared(7, 1).per_lane, 7);
    // More tenants than places: one each, and the total still holds.
    assert_eq!(QueueLimits::shared(2, 5).per_lane, 1);
}

#[test]
fn each_lane_may_hold_its_share_and_the_whole_queue_its_total() {
    let q = FairQueue::new(
        2,
        QueueLimits {
            total: 3,
            per_lane: 2,
            burst: 0,
        },
    );
    push_all(&q, (1..=2).map(|n| j(0, n, 1)));
    let (why, job) = q.push(0, j(0, 3, 1)).unwrap_err();
    assert_eq!((why, job), (Refused::LaneFull, j(0, 3, 1)));
    q.push(1, j(1, 1, 1)).unwrap();
    assert_eq!(q.push(1, j(1, 2, 1)).unwrap_err().0, Refused::Full);
    // Taking one makes room for anyone.
    q.try_take(Budget { cost: 1, jobs: 1 });
    q.push(1, j(1, 2, 1)).unwrap();
    assert_eq!(q.len(), 3);
}

#[test]
fn a_held_place_counts_against_both_bounds_until_pushed_into_or_released() {
    let q = FairQueue::new(
        2,
        QueueLimits {
            total: 3,
            per_lane: 2,
            burst: 0,
        },
    );
    q.hold(0).unwrap();
    q.hold(0).unwrap();
    // Lane 0 holds its share in places alone: a third is refused, a push too.
    assert_eq!(q.hold(0), Err(Refused::LaneFull));
    assert_eq!(q.push(0, j(0, 9, 1)).unwrap_err().0, Refused::LaneFull);
    q.hold(1).unwrap();
    assert_eq!(q.hold(1), Err(Refused::Full));
    assert_eq!((q.len(), q.held()), (0, 3));
    // Pushing into a held place queues the job without a second check.
    q.push_held(0, j(0, 1, 1)).unwrap();
    assert_eq!((q.len(), q.held()), (1, 2));
    // A released place is free for anyone.
    q.release(1);
    q.release(0);
    assert_eq!((q.len(), q.held()), (1, 0));
    q.push(1, j(1, 1, 1)).unwrap();
    q.push(0, j(0, 2, 1)).unwrap();
    assert_eq!(names(&q.try_take(ANY)), ["a1", "b1", "a2"]);
    // A place held when the queue closes is given back by the refused push.
    q.hold(1).unwrap();
    q.close();
    assert_eq!(q.push_held(1, j(1, 2, 1)).unwrap_err().0, Refused::Closed);
    assert_eq!(q.held(), 0);
}

#[test]
fn closing_refuses_new_jobs_and_lets_the_taker_drain_then_stop() {
    let q = Arc::new(queue(1));
    push_all(&q, [j(0, 1, 1), j(0, 2, 1)]);
    q.close();
    assert_eq!(q.push(0, j(0, 3, 1)).unwrap_err().0, Refused::Closed);
    assert_eq!(names(&q.take(ANY).unwrap()), ["a1", "a2"]);
    assert!(q.take(ANY).is_none());
    // A taker blocked on an empty queue is woken by close.
    let q = Arc::new(queue(1));
    let taker = {
        let q = Arc::clone(&q);
        std::thread::spawn(move || q.take(ANY))
    };
    std::thread::sleep(Duration::from_millis(20));
    q.close();
    assert!(taker.join().unwrap().is_none());
}

#[test]
fn wait_estimate_is_the_cost_ahead_at_the_measured_rate() {
    let q = queue(2);
    assert_eq!(
        q.wait_estimate(Some(0)),
        None,
        "no rate before anything is taken"
    );
    push_all(&q, (1..=100).map(|n| j(0, n, 2)));
    let t0 = Instant::now();
    {
        let mut s = q.state();
        // 40 rows taken over the second before `t0 + 1 s`: 40 rows per second.
        for k in 0..10 {
            let at = t0 + Duration::from_millis(k * 100);
            q.take_from(&mut s, Budget { cost: 4, jobs: 10 }, at);
        }
    }
    let now = t0 + Duration::from_secs(1);
    // a's front job (tag 40) is next: its own 2 rows, 0.05 s.
    let front = q.wait_estimate_at(Some(0), now).unwrap();
    assert!((front.as_secs_f64() - 0.05).abs() < 1e-9, "{front:?}");
    // b, with nothing queued, would get the virtual time's tag (38): every job tagged up to 38
    // was taken, so nothing is ahead of it and the estimate is its floor, one row: 0.025 s.
    let b = q.wait_estimate_at(Some(1), now).unwrap();
    assert!((b.as_secs_f64() - 0.025).abs() < 1e-9, "{b:?}");
    // Nothing taken for longer than the window: no estimate.
    assert_eq!(q.wait_estimate_at(None, t0 + Duration::from_secs(60)), None);
}

/// Regression: the queue-depth gauge wrapped below zero, because the engine thread could take a
/// job and count it out before the handler that queued it had counted it in. The count now moves
/// under the queue's lock; this stresses pushes against takes and checks every reading.
#[test]
fn queue_depth_never_wraps_below_zero() {
    const PUSHERS: usize = 4;
    const PER_PUSHER: u32 = 5_000;
    let q = Arc::new(FairQueue::<J>::new(
        PUSHERS,
        QueueLimits::shared(64, PUSHERS),
    ));
    let done = Arc::new(AtomicBool::new(false));
    let max_seen = Arc::new(AtomicUsize::new(0));
    let taker = {
        let (q, done, max_seen) = (Arc::clone(&q), Arc::clone(&done), Arc::clone(&max_seen));
        std::thread::spawn(move || {
            let mut got: Vec<Vec<u32>> = vec![Vec::new(); PUSHERS];
            while !(done.load(Ordering::SeqCst) && q.is_empty()) {
                let len = q.len();
                max_seen.fetch_max(len, Ordering::SeqCst);
                for job in q.try_take(Budget { cost: 5, jobs: 4 }) {
                    got[job.lane].push(job.n);
                }
            }
            got
        })
    };
    let pushers: Vec<_> = (0..PUSHERS)
        .map(|lane| {
            let q = Arc::clone(&q);
            std::thread::spawn(move || {
                for n in 0..PER_PUSHER {
                    let mut job = j(lane, n, 1 + u64::from(n % 3));
                    loop {
                        match q.push(lane, job) {
                            Ok(()) => break,
                            Err((_, back)) => {
                                job = back;
                                std::thread::yield_now();
                            }
                        }
                    }
                }
            })
        })
        .collect();
    for p in pushers {
        p.join().unwrap();
    }
    done.store(true, Ordering::SeqCst);
    let got = taker.join().unwrap();
    assert!(max_seen.load(Ordering::SeqCst) <= 64, "{max_seen:?}");
    assert_eq!(q.len(), 0);
    for (lane, numbers) in got.iter().enumerate() {
        // Every job taken once, each tenant's in the order it sent them.
        let expected: Vec<u32> = (0..PER_PUSHER).collect();
        assert_eq!(numbers, &expected, "lane {lane}");
    }
}
