//! Property tests over generated rules: the canonical text reads back to the same rule,
//! evaluation never panics whatever the inputs, and the static analysis never claims
//! something a run contradicts.

use chrono::Weekday;
use proptest::prelude::*;
use proptest::test_runner::FileFailurePersistence;

use crate::rules::tests::support::{NAMES, Site};
use crate::rules::{EvalInput, LocalClock, Rule, Truth, compile, implies, satisfiable};
use crate::units::Timestamp;

/// Dimensions the generator writes expressions in, with names and literal spellings.
const KINDS: &[(&[&str], &[&str])] = &[
    (&["surplus", "grid", "import", "pv", "load", "tank.power"], &["3kW", "3.2 kW", "-250W", "0.5 MW", "1500 W", "0W"]),
    (&["tank_temp"], &["58°C", "62 degC", "-5 °C", "40°C"]),
    (&["soc"], &["80%", "20 %", "100%", "0%"]),
    (&["tank.runtime_today"], &["2h", "90 min", "30s", "1.5h", "250ms"]),
    (&["tank.energy_today"], &["12kWh", "500 Wh", "1.25 MWh"]),
    (&["battery.voltage"], &["51.2V", "48 V"]),
    (&["ev.current"], &["16A", "6 A"]),
    (&["cycles"], &["3", "0", "2.5"]),
];

const DURATIONS: &[&str] = &["10s", "30 s", "5min", "1.5h", "250 ms", "2 min"];
const DAYS: &[&str] = &["mon", "tue", "wed", "thu", "fri", "sat", "sun"];
const CMP: &[&str] = &["<", "<=", ">", ">=", "==", "!="];

fn pick(items: &'static [&'static str]) -> impl Strategy<Value = String> {
    prop::sample::select(items).prop_map(str::to_owned)
}

/// A numeric expression of kind `k`.
fn number(k: usize) -> BoxedStrategy<String> {
    let (names, literals) = KINDS[k];
    let leaf = prop_oneof![pick(names), pick(literals)];
    leaf.prop_recursive(3, 12, 2, move |inner| {
        prop_oneof![
            (inner.clone(), inner.clone()).prop_map(|(a, b)| format!("{a} + {b}")),
            (inner.clone(), inner.clone()).prop_map(|(a, b)| format!("{a} - ({b})")),
            (inner.clone(), 1u32..10).prop_map(|(a, n)| format!("({a}) * {n}")),
            (inner.clone(), 1u32..10).prop_map(|(a, n)| format!("{n}*{a}")),
            (inner.clone(), 1u32..10).prop_map(|(a, n)| format!("({a}) / {n}")),
            inner.clone().prop_map(|a| format!("-({a})")),
            (pick(&["avg", "min", "max"]), inner.clone(), pick(DURATIONS))
                .prop_map(|(f, a, d)| format!("{f}({a}, {d})")),
        ]
    })
    .boxed()
}

fn time() -> impl Strategy<Value = String> {
    prop_oneof![(0u32..24, 0u32..60).prop_map(|(h, m)| format!("{h:02}:{m:02}")), Just("24:00".to_owned()),]
}

/// A condition.
fn condition() -> BoxedStrategy<String> {
    let comparison = (0..KINDS.len())
        .prop_flat_map(|k| (number(k), pick(CMP), number(k)))
        .prop_map(|(a, op, b)| format!("{a} {op} {b}"));
    let leaf = prop_oneof![
        4 => comparison,
        1 => pick(&["tank.on", "pool.on", "true", "false"]),
        1 => (time(), time()).prop_map(|(a, b)| format!("clock in {a}..{b}")),
        1 => (pick(CMP), time()).prop_map(|(op, t)| format!("clock {op} {t}")),
        1 => (pick(DAYS), pick(DAYS)).prop_map(|(a, b)| format!("weekday in {a}..{b}")),
        1 => (pick(DAYS), pick(DAYS)).prop_map(|(a, b)| format!("weekday in [{a}, {b}]")),
        1 => pick(DAYS).prop_map(|d| format!("weekday == {d}")),
    ];
    leaf.prop_recursive(4, 16, 2, |inner| {
        prop_oneof![
            (inner.clone(), inner.clone()).prop_map(|(a, b)| format!("{a} and {b}")),
            (inner.clone(), inner.clone()).prop_map(|(a, b)| format!("({a}) or {b}")),
            inner.clone().prop_map(|a| format!("not ({a})")),
            (inner.clone(), pick(DURATIONS)).prop_map(|(a, d)| format!("({a}) for {d}")),
        ]
    })
    .boxed()
}

/// One tick: the values of every name, a step forward in time, and the local clock.
fn tick(any_value: bool) -> impl Strategy<Value = (Vec<f64>, i64, u32, u8)> {
    let value = if any_value {
        prop::num::f64::ANY.boxed()
    } else {
        prop_oneof![Just(f64::NAN), Just(0.0), Just(1.0), -6000.0..6000.0f64, 0.0..100.0f64,].boxed()
    };
    (
        prop::collection::vec(value, NAMES.len()),
        prop_oneof![Just(0i64), 1i64..5_000, Just(60_000i64)],
        0u32..90_000,
        0u8..7,
    )
}

const WEEK: [Weekday; 7] =
    [Weekday::Mon, Weekday::Tue, Weekday::Wed, Weekday::Thu, Weekday::Fri, Weekday::Sat, Weekday::Sun];

/// Evaluates `rule` over `ticks` and returns each tick's truth and explanation.
fn run(rule: &Rule, ticks: &[(Vec<f64>, i64, u32, u8)]) -> Vec<(Truth, String)> {
    let mut state = rule.new_state();
    let mut now = 1_780_272_000_000i64;
    ticks
        .iter()
        .map(|(values, step, seconds_of_day, day)| {
            now += step;
            let input = EvalInput {
                values,
                now: Timestamp::from_millis(now),
                local: LocalClock { seconds_of_day: *seconds_of_day, weekday: WEEK[*day as usize] },
            };
            let t = rule.eval(&input, &mut state);
            (t, rule.explain(&input, &state))
        })
        .collect()
}

fn compiled(text: &str) -> Result<Rule, TestCaseError> {
    compile(text, &Site).map(|c| c.rule).map_err(|d| TestCaseError::fail(format!("{text}: {d:?}")))
}

proptest! {
    // Failing seeds are kept beside this file (props.regressions), inside the rules
    // module, and replayed first on the next run.
    #![proptest_config(ProptestConfig {
        cases: 256,
        failure_persistence: Some(Box::new(FileFailurePersistence::WithSource("regressions"))),
        ..ProptestConfig::default()
    })]

    #[test]
    fn describe_reads_back_to_the_same_rule(
        text in condition(),
        ticks in prop::collection::vec(tick(false), 1..12),
    ) {
        let first = compiled(&text)?;
        let canonical = first.describe();
        let second = compiled(&canonical)?;
        prop_assert_eq!(&second.describe(), &canonical);
        // Same meaning, not only same text: both evaluate alike tick by tick.
        let a: Vec<Truth> = run(&first, &ticks).into_iter().map(|(t, _)| t).collect();
        let b: Vec<Truth> = run(&second, &ticks).into_iter().map(|(t, _)| t).collect();
        prop_assert_eq!(a, b, "{} vs {}", text, canonical);
    }

    #[test]
    fn eval_never_panics_on_any_input(
        text in condition(),
        ticks in prop::collection::vec(tick(true), 1..16),
    ) {
        let rule = compiled(&text)?;
        run(&rule, &ticks);
    }

    #[test]
    fn static_analysis_agrees_with_evaluation(
        text in condition(),
        ticks in prop::collection::vec(tick(false), 1..12),
    ) {
        let rule = compiled(&text)?;
        let results = run(&rule, &ticks);
        if satisfiable(&rule) == Some(false) {
            prop_assert!(
                results.iter().all(|(t, _)| *t != Truth::True),
                "{} was called unsatisfiable but evaluated true", text
            );
        }
        prop_assert_ne!(implies(&rule, &rule), Some(false), "{} must imply itself", text);
    }

    #[test]
    fn implies_is_never_contradicted_by_a_run(
        a in condition(),
        b in condition(),
        ticks in prop::collection::vec(tick(false), 1..12),
    ) {
        let (ra, rb) = (compiled(&a)?, compiled(&b)?);
        // Also try `a` against a weakening of itself, which implication must accept.
        let weaker = compiled(&format!("({a}) or ({b})"))?;
        prop_assert_ne!(implies(&ra, &weaker), Some(false), "{} must imply its weakening", a);
        for (other, text) in [(&rb, &b), (&weaker, &b)] {
            if implies(&ra, other) == Some(true) {
                let x = run(&ra, &ticks);
                let y = run(other, &ticks);
                for ((ta, _), (tb, _)) in x.iter().zip(&y) {
                    prop_assert!(
                        *ta != Truth::True || *tb == Truth::True,
                        "{} was said to imply {} but a run disagrees", a, text
                    );
                }
            }
        }
    }

    #[test]
    fn arbitrary_text_never_panics_the_compiler(text in "\\PC{0,60}") {
        let _ = compile(&text, &Site);
    }

    #[test]
    fn near_miss_text_never_panics_the_compiler(
        text in "[a-z_. ()<>=!0-9:%°,\\[\\]+*/-]{0,40}",
    ) {
        if let Ok(c) = compile(&text, &Site) {
            let _ = c.rule.describe();
        }
    }
}
