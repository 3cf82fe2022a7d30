//! Rule evaluation speed: a typical start rule with one `for` and one `avg`, evaluated
//! once per simulated second, and what compiling it costs. Before measuring, it checks
//! that steady-state evaluation does not allocate, with a counting global allocator.

use std::alloc::{GlobalAlloc, Layout, System};
use std::hint::black_box;
use std::sync::atomic::{AtomicUsize, Ordering};

use chrono::Weekday;
use criterion::{Criterion, criterion_group, criterion_main};
use spillway::rules::{EvalInput, LocalClock, Rule, Scope, Slot, Type, compile};
use spillway::units::{Dimension, Timestamp};

/// Counts every allocation, so the bench can prove that `eval` makes none.
struct Counting;

static ALLOCATIONS: AtomicUsize = AtomicUsize::new(0);

// SAFETY: forwards every call to the system allocator unchanged; counting has no
// effect on the memory handed out.
unsafe impl GlobalAlloc for Counting {
    unsafe fn alloc(&self, layout: Layout) -> *mut u8 {
        ALLOCATIONS.fetch_add(1, Ordering::Relaxed);
        // SAFETY: same contract as ours, passed through.
        unsafe { System.alloc(layout) }
    }

    unsafe fn dealloc(&self, ptr: *mut u8, layout: Layout) {
        // SAFETY: same contract as ours, passed through.
        unsafe { System.dealloc(ptr, layout) }
    }

    unsafe fn realloc(&self, ptr: *mut u8, layout: Layout, new_size: usize) -> *mut u8 {
        ALLOCATIONS.fetch_add(1, Ordering::Relaxed);
        // SAFETY: same contract as ours, passed through.
        unsafe { System.realloc(ptr, layout, new_size) }
    }
}

#[global_allocator]
static GLOBAL: Counting = Counting;

struct Site;

const NAMES: [(&str, Type); 3] = [
    ("surplus", Type::Number(Dimension::Power)),
    ("tank_temp", Type::Number(Dimension::Temperature)),
    ("tank.on", Type::Bool),
];

impl Scope for Site {
    fn lookup(&self, name: &str) -> Option<(Slot, Type)> {
        let i = NAMES.iter().position(|(n, _)| *n == name)?;
        Some((Slot(i as u32), NAMES[i].1))
    }

    fn names(&self) -> Vec<String> {
        NAMES.iter().map(|(n, _)| (*n).to_owned()).collect()
    }
}

const RULE: &str = "surplus > 3.2kW for 30s and avg(tank_temp, 5min) < 58°C";

fn typical_rule() -> Rule {
    match compile(RULE, &Site) {
        Ok(c) => c.rule,
        Err(d) => panic!("the bench rule must compile: {d:?}"),
    }
}

/// A day of invented, noisy values: surplus swinging around the threshold, the tank
/// warming slowly.
fn values() -> Vec<[f64; 3]> {
    (0..1024)
        .map(|i| {
            let x = f64::from(i);
            [3200.0 + 400.0 * (x / 37.0).sin(), 50.0 + 6.0 * (x / 300.0).sin(), if i % 97 < 50 { 1.0 } else { 0.0 }]
        })
        .collect()
}

/// Evaluates `ticks` one-second ticks and returns how many were true.
fn run(rule: &Rule, state: &mut spillway::rules::RuleState, table: &[[f64; 3]], start: i64, ticks: i64) -> usize {
    let mut true_ticks = 0;
    for k in 0..ticks {
        let now = start + k;
        let values = &table[(now as usize) % table.len()];
        let input = EvalInput {
            values,
            now: Timestamp::from_millis(now * 1000),
            local: LocalClock { seconds_of_day: (now % 86_400) as u32, weekday: Weekday::Mon },
        };
        if rule.eval(&input, state).is_true() {
            true_ticks += 1;
        }
    }
    true_ticks
}

fn check_no_allocation() {
    let rule = typical_rule();
    let mut state = rule.new_state();
    let table = values();
    // Warm up past the longest window so the buffers reach their steady size.
    run(&rule, &mut state, &table, 0, 1_000);
    let before = ALLOCATIONS.load(Ordering::Relaxed);
    let true_ticks = run(&rule, &mut state, &table, 1_000, 100_000);
    let allocations = ALLOCATIONS.load(Ordering::Relaxed) - before;
    println!("steady state: {allocations} allocations in 100000 evaluations ({true_ticks} true)");
    assert_eq!(allocations, 0, "eval must not allocate in steady state");
}

fn bench(c: &mut Criterion) {
    check_no_allocation();
    let rule = typical_rule();
    let table = values();
    let mut state = rule.new_state();
    run(&rule, &mut state, &table, 0, 1_000);
    let mut now = 1_000i64;
    c.bench_function("rules/eval typical rule (for + avg)", |b| {
        b.iter(|| {
            now += 1;
            let input = EvalInput {
                values: &table[(now as usize) % table.len()],
                now: Timestamp::from_millis(now * 1000),
                local: LocalClock { seconds_of_day: (now % 86_400) as u32, weekday: Weekday::Mon },
            };
            black_box(rule.eval(black_box(&input), &mut state))
        })
    });
    c.bench_function("rules/compile typical rule", |b| b.iter(|| black_box(compile(black_box(RULE), &Site).is_ok())));
    let mut short = rule.new_state();
    run(&rule, &mut short, &table, 0, 1_000);
    c.bench_function("rules/explain typical rule", |b| {
        let input = EvalInput {
            values: &table[0],
            now: Timestamp::from_millis(1_000_000),
            local: LocalClock { seconds_of_day: 0, weekday: Weekday::Mon },
        };
        b.iter(|| black_box(rule.explain(&input, &short)))
    });
}

criterion_group!(benches, bench);
criterion_main!(benches);
