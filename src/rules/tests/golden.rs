//! Golden snapshots of the messages a user sees for broken rules, rendered as the CLI
//! renders them (without colour). Each case is a file under `src/rules/test_data/`;
//! after a deliberate change to a message, re-bless them with
//! `UPDATE_EXPECT=1 cargo test --lib rules::tests::golden`.

use expect_test::expect_file;

use crate::diag::render;
use crate::rules::tests::support::Site;
use crate::rules::{compile, to_diagnostic};

/// (file name, rule text).
const CASES: &[(&str, &str)] = &[
    ("R0101_assignment_instead_of_comparison", "weekday = sat"),
    ("R0101_unexpected_character", "surplus > 3kW $ tank.on"),
    ("R0102_unknown_unit", "surplus > 3kw for 30s"),
    ("R0102_unit_spelt_out", "tank.runtime_today < 2 hours"),
    ("R0103_hour_out_of_range", "clock in 10:00..25:00"),
    ("R0103_minute_out_of_range", "clock >= 16:75"),
    (
        "R0104_number_too_large",
        "surplus > 100000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000000 MW",
    ),
    ("R0105_missing_operand", "surplus > 3kW and"),
    ("R0106_unclosed_parenthesis", "(surplus > 3kW and tank.on"),
    ("R0107_chained_comparison", "1kW < surplus < 3kW"),
    ("R0108_missing_operator", "surplus > 3kW tank.on"),
    ("R0108_hold_spelt_otherwise", "surplus > 3.2kW held 30s and tank.on"),
    ("R0109_empty_rule", ""),
    ("R0110_uppercase_name", "Surplus > 3kW"),
    ("R0111_incomplete_attribute", "tank. > 1kW"),
    ("R0112_unit_without_number", "surplus > kW"),
    ("R0201_unknown_name", "surplus > 3kW and tank_tmp < 58°C"),
    ("R0201_weekday_spelt_out", "weekday == saturday"),
    ("R0202_unknown_function", "average(surplus, 5min) > 1kW"),
    ("R0203_function_without_arguments", "avg > 3kW"),
    ("R0204_aggregate_arguments", "avg(surplus) > 1kW"),
    ("R0301_compare_mismatch", "surplus > 58°C"),
    ("R0301_add_mismatch", "pv + tank_temp > 1kW"),
    ("R0302_not_a_condition", "surplus and tank.on"),
    ("R0303_bare_number", "surplus > 3000"),
    ("R0303_bare_percentage", "soc > 0.8"),
    ("R0304_hold_without_unit", "surplus > 3kW for 30"),
    ("R0305_hold_not_a_literal", "surplus > 3kW for tank.runtime_today"),
    ("R0306_multiply_quantities", "surplus * grid > 1kW"),
    ("R0307_numeric_range", "soc in 20%..80%"),
    ("R0308_rule_not_a_condition", "pv - load"),
    ("R0309_weekday_order", "weekday < fri"),
    ("R0310_window_of_a_condition", "avg(tank.on, 1h) > 50%"),
    ("R0311_time_arithmetic", "clock + 1h > 10:00"),
    ("R0312_zero_window", "avg(surplus, 0s) > 1kW"),
    ("several_errors_at_once", "surplus > 3kw and tank_tmp < 25:00 and soc > 0.8"),
    ("R0401_constant_comparison", "3kW > 2kW or tank.on"),
    ("R0402_percentage_out_of_range", "soc > 120% or tank.on"),
    ("R0403_contradiction", "surplus > 5kW and tank.on and surplus < 3kW"),
    ("R0404_hold_for_zero", "tank.on for 0s"),
    ("R0405_tautology", "surplus > 3kW or surplus <= 3kW"),
    ("R0406_empty_time_window", "clock in 10:00..10:00 and tank.on"),
    ("R0407_hold_outlasts_the_clock", "clock == 10:00 for 1min and tank.on"),
];

/// What the user sees: the rule, then every diagnostic drawn under it.
fn rendered(text: &str) -> String {
    let diags = match compile(text, &Site) {
        Ok(c) => c.warnings,
        Err(d) => d,
    };
    let diags: Vec<_> = diags.iter().map(|d| to_diagnostic(d, 0)).collect();
    format!("rule: {text}\n\n{}", render("rule", text, &diags, false))
}

#[test]
fn broken_rules_explain_themselves() {
    for (name, text) in CASES {
        expect_file![format!("../test_data/{name}.txt")].assert_eq(&rendered(text));
    }
}

#[test]
fn every_case_finds_the_code_it_is_named_after() {
    for (name, text) in CASES {
        let diags = match compile(text, &Site) {
            Ok(c) => c.warnings,
            Err(d) => d,
        };
        assert!(!diags.is_empty(), "{name}: no diagnostic");
        if let Some(code) = name.split('_').next().filter(|c| c.starts_with('R')) {
            assert!(
                diags.iter().any(|d| d.code == code),
                "{name}: found {:?}",
                diags.iter().map(|d| d.code).collect::<Vec<_>>()
            );
        }
    }
}

#[test]
fn spans_shift_into_the_enclosing_file() {
    let file = "start: surplus > 3kw\n";
    let offset = file.find("surplus").unwrap_or(0);
    let Err(diags) = compile("surplus > 3kw", &Site) else {
        panic!("kw is not a unit");
    };
    let d = to_diagnostic(&diags[0], offset);
    assert_eq!(&file[d.primary.span.clone()], "kw");
    assert_eq!(&file[d.secondary[0].span.clone()], "3");
    let out = render("site.yaml", file, &[d], false);
    assert!(out.contains("site.yaml:1:19"), "{out}");
}
