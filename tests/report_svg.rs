//! Axis maths of the report's SVG helper against values worked out by hand
//! (and the report's timestamps against Python's datetime):
//! decade and 1-2-5 ticks on log axes, positions on a log axis, "nice"
//! linear steps (Heckbert, Graphics Gems 1990, rounding variant), tick
//! labels, and which grids count as logarithmic.

#![allow(clippy::unwrap_used, clippy::expect_used)]

use plumbline::report::svg::{
    Scale, is_logarithmic, linear_ticks, log_ticks, nice_step, tick_label,
};

fn close(a: f64, b: f64) -> bool {
    (a - b).abs() <= 1e-12 * (1.0 + a.abs().max(b.abs()))
}

#[test]
fn log_scale_widens_to_whole_decades() {
    // log10(0.003) = −2.52 → floor −3; log10(300) = 2.48 → ceil 3.
    assert_eq!(
        Scale::log(0.003, 300.0),
        Scale::Log {
            lo: 0.001,
            hi: 1000.0
        }
    );
    // A single value still gets one decade.
    assert_eq!(Scale::log(5.0, 5.0), Scale::Log { lo: 1.0, hi: 10.0 });
    assert_eq!(Scale::log(1.0, 1.0), Scale::Log { lo: 1.0, hi: 10.0 });
    // Nothing positive: a usable axis rather than NaN.
    assert_eq!(Scale::log(0.0, 0.0), Scale::Log { lo: 1.0, hi: 10.0 });
}

#[test]
fn log_ticks_are_decades_or_one_two_five() {
    // Seven decades, 10^-3 … 10^3: one tick each.
    assert_eq!(
        Scale::log(0.003, 300.0).ticks(),
        vec![0.001, 0.01, 0.1, 1.0, 10.0, 100.0, 1000.0]
    );
    // Only three decade marks fit in [1, 100]: the 2 and 5 multiples join.
    assert_eq!(
        Scale::log(2.0, 30.0).ticks(),
        vec![1.0, 2.0, 5.0, 10.0, 20.0, 50.0, 100.0]
    );
    // Thirteen decades: every second one (⌈13/8⌉ = 2), from the first.
    assert_eq!(
        log_ticks(1e-6, 1e6),
        vec![1e-6, 1e-4, 1e-2, 1.0, 1e2, 1e4, 1e6]
    );
    // A range that is not whole decades: 2, 5, 10, 20 lie in [2, 30].
    assert_eq!(log_ticks(2.0, 30.0), vec![2.0, 5.0, 10.0, 20.0]);
    assert!(log_ticks(0.0, 10.0).is_empty());
}

#[test]
fn log_positions_are_fractions_of_decades() {
    let s = Scale::log(1.0, 1000.0);
    // log10(10)/3 = 1/3; log10(√10)/3 = 1/6; the ends are 0 and 1.
    assert!(close(s.fraction(10.0), 1.0 / 3.0));
    assert!(close(s.fraction(10f64.sqrt()), 1.0 / 6.0));
    assert!(close(s.fraction(1.0), 0.0));
    assert!(close(s.fraction(1000.0), 1.0));
    assert!(!s.accepts(0.0) && !s.accepts(-1.0) && s.accepts(1e-9));
}

#[test]
fn linear_steps_are_nice_numbers() {
    // span/5: 0.2 → 2×10⁻¹; 0.654 → 5×10⁻¹ (6.54 < 7); 1.4 → 1 (1.4 < 1.5);
    // 0.8 → 1 (8 ≥ 7 rounds up to 10×10⁻¹); 2.9 → 2 (< 3); 35 → 50.
    assert!(close(nice_step(1.0, 5), 0.2));
    assert!(close(nice_step(3.27, 5), 0.5));
    assert!(close(nice_step(7.0, 5), 1.0));
    assert!(close(nice_step(4.0, 5), 1.0));
    assert!(close(nice_step(14.5, 5), 2.0));
    assert!(close(nice_step(175.0, 5), 50.0));
    // Ticks are clean decimals, not 0.6000000000000001.
    assert_eq!(
        linear_ticks(0.0, 1.0, 5),
        vec![0.0, 0.2, 0.4, 0.6, 0.8, 1.0]
    );
    assert_eq!(
        linear_ticks(-0.37, 2.9, 5),
        vec![0.0, 0.5, 1.0, 1.5, 2.0, 2.5]
    );
    // The scale widens to whole steps: [−0.5, 3.0] with step 0.5.
    let s = Scale::linear(-0.37, 2.9);
    assert_eq!(
        s,
        Scale::Linear {
            lo: -0.5,
            hi: 3.0,
            step: 0.5
        }
    );
    assert_eq!(s.ticks().len(), 8);
    assert!(close(s.fraction(1.25), 0.5));
    // A single value gets room around it.
    let s = Scale::linear(2.0, 2.0);
    let (lo, hi) = s.bounds();
    assert!(lo < 2.0 && hi > 2.0);
}

#[test]
fn tick_labels_are_plain_in_range_and_exponents_outside() {
    assert_eq!(tick_label(0.001), "0.001");
    assert_eq!(tick_label(0.5), "0.5");
    assert_eq!(tick_label(1000.0), "1000");
    assert_eq!(tick_label(1e-4), "1e-4");
    assert_eq!(tick_label(2e5), "2e5");
    assert_eq!(tick_label(0.0), "0");
    assert_eq!(tick_label(-2.5), "-2.5");
}

#[test]
fn geometric_grids_are_logarithmic_and_arithmetic_ones_are_not() {
    assert!(is_logarithmic(&[1e-3, 1e-2, 1e-1, 1.0, 10.0]));
    assert!(is_logarithmic(&[100.0, 10.0, 1.0])); // order does not matter
    // k-NN style 1, 2, 3, 5, 8, 13, 21: ratios 2 … 1.6 vary less than
    // differences 1 … 8.
    assert!(is_logarithmic(&[1.0, 2.0, 3.0, 5.0, 8.0, 13.0, 21.0]));
    assert!(!is_logarithmic(&[
        1.0, 2.0, 3.0, 4.0, 5.0, 6.0, 7.0, 8.0, 9.0, 10.0
    ]));
    assert!(!is_logarithmic(&[1.0, 5.0])); // less than a factor of ten
    assert!(!is_logarithmic(&[0.0, 1.0, 10.0, 100.0])); // zero has no log
    assert!(!is_logarithmic(&[3.0]));
}

#[test]
fn created_at_timestamps_are_rfc3339_utc() {
    use plumbline::report::rfc3339_utc;
    use std::time::{Duration, UNIX_EPOCH};
    // Expected strings from Python's datetime.fromtimestamp(t, timezone.utc)
    // .strftime('%Y-%m-%dT%H:%M:%SZ') on the same instants.
    for (secs, want) in [
        (0u64, "1970-01-01T00:00:00Z"),
        (951_782_400, "2000-02-29T00:00:00Z"),
        (1_700_000_000, "2023-11-14T22:13:20Z"),
        (1_741_944_413, "2025-03-14T09:26:53Z"),
        (4_102_444_799, "2099-12-31T23:59:59Z"),
        (253_402_300_799, "9999-12-31T23:59:59Z"),
    ] {
        assert_eq!(rfc3339_utc(UNIX_EPOCH + Duration::from_secs(secs)), want);
    }
    assert_eq!(
        rfc3339_utc(UNIX_EPOCH - Duration::from_secs(1)),
        "1969-12-31T23:59:59Z"
    );
}

#[test]
fn plots_place_data_in_the_frame_and_skip_what_cannot_be_drawn() {
    use plumbline::report::svg::Plot;
    // The frame runs from x = 64 to 560 − 28 = 532 and from y = 360 − 50 =
    // 310 (bottom) to 30 (top); on a log axis over [1, 100], 10 is halfway:
    // 64 + (532 − 64)/2 = 298.
    let mut p = Plot::new(Scale::log(1.0, 100.0), Scale::linear(0.0, 1.0));
    p.points(
        &[
            (1.0, 0.0),
            (100.0, 1.0),
            (10.0, 0.5),
            (0.0, 0.5),      // no log of zero
            (f64::NAN, 0.5), // undefined
        ],
        3.0,
        "pt",
    );
    let svg = p.finish("a <test> plot");
    assert_eq!(svg.matches("<circle").count(), 3);
    assert!(svg.contains(r#"cx="64.0" cy="310.0""#), "{svg}");
    assert!(svg.contains(r#"cx="532.0" cy="30.0""#), "{svg}");
    assert!(svg.contains(r#"cx="298.0" cy="170.0""#), "{svg}");
    assert!(svg.contains("<title>a &lt;test&gt; plot</title>"));
    assert!(svg.starts_with("<svg ") && svg.ends_with("</svg>"));
}
