//! How simulation results are shown: a plain table, JSON, or an SVG plot.
//!
//! Only SVG is drawn: plotters' bitmap backend needs a font library (FreeType and fontconfig) to
//! put text into pixels, which this build does without; an SVG converts to PNG with any viewer.

use std::fmt::Write as _;
use std::path::Path;

use plotters::prelude::*;

use super::SimReport;

/// A plain table: one row per policy, mean regret ± standard error at each checkpoint.
pub fn table(report: &SimReport) -> String {
    let mut s = String::new();
    let arms: Vec<String> = report.arms.iter().map(|m| format!("{m}")).collect();
    let _ = writeln!(
        s,
        "arms {} · horizon {} · {} runs · batch {}",
        arms.join(", "),
        report.horizon,
        report.runs,
        report.batch
    );
    let c = report.lai_robbins_constant;
    let _ = writeln!(
        s,
        "Lai–Robbins constant C = {c:.3}; asymptotic rate C·ln n at the horizon = {:.1} (finite horizons usually lie below it)\n",
        c * (report.horizon as f64).ln()
    );
    let width = report.results.iter().map(|r| r.policy.len()).max().unwrap_or(6).max(6);
    let _ = write!(s, "{:<width$}", "policy");
    let cps: Vec<u64> = report.results.first().map(|r| r.checkpoints.iter().map(|c| c.t).collect()).unwrap_or_default();
    for t in &cps {
        let _ = write!(s, "  {:>18}", format!("t={t}"));
    }
    s.push('\n');
    for r in &report.results {
        let _ = write!(s, "{:<width$}", r.policy);
        for c in &r.checkpoints {
            let _ = write!(s, "  {:>18}", format!("{:.1} ± {:.1}", c.regret_mean, c.regret_stderr));
        }
        s.push('\n');
    }
    s.push_str("\nregret: mean pseudo-regret Σ(μ* − μ of the pulled arm) over the runs, ± standard error\n");
    if let Some(t) = &report.timing {
        timing(&mut s, report, t);
    }
    if let Some(study) = &report.settle {
        settling(&mut s, report, study);
    }
    s
}

/// The settle study: per policy, the share of runs that settled, the time to settle, the share
/// that settled on a wrong arm, and the regret by then.
fn settling(s: &mut String, report: &SimReport, study: &super::settle::Study) {
    let r = &study.rule;
    let _ = writeln!(
        s,
        "\nsettle rule: P(best) ≥ {} for the leader, expected loss ≤ {}% of its mean, ≥ {} matured pulls on every arm; looked at every {} pulls",
        r.best_probability,
        100.0 * r.relative_loss,
        r.min_pulls,
        study.every
    );
    let width = report.results.iter().map(|r| r.policy.len()).max().unwrap_or(6).max(6);
    let _ = writeln!(
        s,
        "{:<width$}  {:>8}  {:>12}  {:>12}  {:>10}  {:>20}",
        "policy", "settled", "median pulls", "p90 pulls", "wrong arm", "regret at settling"
    );
    let pulls = |p: Option<u64>| p.map_or(format!("> {}", report.horizon), |p| p.to_string());
    for res in &report.results {
        let Some(f) = &res.settle else { continue };
        let _ = writeln!(
            s,
            "{:<width$}  {:>7.1}%  {:>12}  {:>12}  {:>9.2}%  {:>20}",
            res.policy,
            100.0 * f.settled_share,
            pulls(f.pulls_median),
            pulls(f.pulls_p90),
            100.0 * f.wrong_share,
            format!("{:.1} ± {:.1}", f.regret_at_settle_mean, f.regret_at_settle_stderr),
        );
    }
    s.push_str(
        "settled: share of runs that met the rule by the horizon · pulls: until first met, over all runs (nearest rank)\n\
         wrong arm: share of all runs that settled on an arm with a lower true mean than the best · regret: over the runs that settled\n",
    );
}

/// What the delay did to the estimates: the mean error of each arm's reported mean at the
/// horizon, the pulls still pending and the rewards that came too late.
fn timing(s: &mut String, report: &SimReport, t: &super::Timing) {
    let delay = match t.delay {
        super::Delay::Exponential { mean_seconds } => format!("exponential, mean {mean_seconds} s"),
        super::Delay::Fixed { seconds } => format!("fixed {seconds} s"),
    };
    let window = t.attribution_window_seconds.map_or("none (pulls count at once)".to_string(), |w| format!("{w} s"));
    let _ = writeln!(
        s,
        "\nreward delay {delay} · {} impressions/s (horizon {:.0} s) · attribution window {window}",
        t.rate_per_second,
        report.horizon as f64 / t.rate_per_second
    );
    let width = report.results.iter().map(|r| r.policy.len()).max().unwrap_or(6).max(6);
    let _ = write!(s, "{:<width$}", "policy");
    for j in 1..=report.arms.len() {
        let _ = write!(s, "  {:>20}", format!("error arm-{j}"));
    }
    let _ = writeln!(s, "  {:>8}  {:>8}", "pending", "late");
    for r in &report.results {
        let Some(e) = &r.estimates else { continue };
        let _ = write!(s, "{:<width$}", r.policy);
        for (m, se) in e.mean_error.iter().zip(&e.mean_error_stderr) {
            let _ = write!(s, "  {:>20}", format!("{m:+.5} ± {se:.5}"));
        }
        let _ = writeln!(s, "  {:>7.2}%  {:>7.2}%", 100.0 * e.pending_share, 100.0 * e.late_share);
    }
    s.push_str(
        "error: reported mean − true mean at the horizon, over the runs, ± standard error (negative: pulled down by rewards not yet come)\n\
         pending: pulls waiting for their window to close · late: rewards after their window, not applied\n",
    );
}

/// Refuses a plot file that would not be SVG, before anything is simulated.
pub fn check_plot_path(path: &Path) -> Result<(), String> {
    match path.extension().and_then(|e| e.to_str()) {
        Some(e) if e.eq_ignore_ascii_case("svg") => Ok(()),
        _ => Err(format!(
            "--plot {}: only SVG is drawn; give a file name ending in .svg (any SVG viewer converts it to PNG)",
            path.display()
        )),
    }
}

/// A tick label as people write counts: 10, 100, 1 000, 20 000 (not 1.0, 10.0).
fn tick(v: &f64) -> String {
    if v.fract().abs() > 1e-9 {
        return format!("{}", (v * 100.0).round() / 100.0);
    }
    let digits = format!("{}", v.abs().round() as u64);
    let mut grouped = String::new();
    for (i, d) in digits.chars().enumerate() {
        if i > 0 && (digits.len() - i) % 3 == 0 {
            grouped.push(' ');
        }
        grouped.push(d);
    }
    if *v < 0.0 {
        grouped.insert(0, '−');
    }
    grouped
}

/// Mean regret against t on a log axis, one line per policy (through its dense curve points)
/// with its standard error shaded, and the Lai–Robbins rate C·ln t, which policies reach only
/// asymptotically: at finite horizons they usually lie below it.
pub fn plot(report: &SimReport, path: &Path) -> Result<(), String> {
    check_plot_path(path)?;
    let fail = |e: &dyn std::fmt::Display| format!("cannot draw {}: {e}", path.display());
    let root = SVGBackend::new(path, (900, 560)).into_drawing_area();
    root.fill(&WHITE).map_err(|e| fail(&e))?;
    let horizon = report.horizon.max(10) as f64;
    let c = report.lai_robbins_constant;
    let top = report
        .results
        .iter()
        .flat_map(|r| r.curve.iter().map(|p| p.regret_mean + p.regret_stderr))
        .fold(c * horizon.ln(), f64::max)
        .max(1.0)
        * 1.08;
    let mut chart = ChartBuilder::on(&root)
        .caption("Mean cumulative regret", ("sans-serif", 22))
        .margin(16)
        .x_label_area_size(44)
        .y_label_area_size(64)
        .build_cartesian_2d((1.0..horizon).log_scale(), 0.0..top)
        .map_err(|e| fail(&e))?;
    chart
        .configure_mesh()
        .x_desc("pulls t (log scale)")
        .y_desc("regret")
        .x_label_formatter(&tick)
        .y_label_formatter(&tick)
        .draw()
        .map_err(|e| fail(&e))?;
    for (i, r) in report.results.iter().enumerate() {
        let colour = Palette99::pick(i).to_rgba();
        let mut pts: Vec<(f64, f64, f64)> = vec![(1.0, 0.0, 0.0)];
        pts.extend(r.curve.iter().filter(|p| p.t > 1).map(|p| (p.t as f64, p.regret_mean, p.regret_stderr)));
        let band: Vec<(f64, f64)> = pts
            .iter()
            .map(|&(t, m, e)| (t, m + e))
            .chain(pts.iter().rev().map(|&(t, m, e)| (t, (m - e).max(0.0))))
            .collect();
        chart.draw_series(std::iter::once(Polygon::new(band, colour.mix(0.2)))).map_err(|e| fail(&e))?;
        chart
            .draw_series(LineSeries::new(pts.iter().map(|&(t, m, _)| (t, m)), colour.stroke_width(2)))
            .map_err(|e| fail(&e))?
            .label(r.policy.clone())
            .legend(move |(x, y)| PathElement::new(vec![(x, y), (x + 18, y)], colour.stroke_width(2)));
    }
    for (i, r) in report.results.iter().enumerate() {
        let Some(t) = r.settle.as_ref().and_then(|f| f.pulls_median) else { continue };
        let colour = Palette99::pick(i).to_rgba();
        chart
            .draw_series(DashedLineSeries::new([(t as f64, 0.0), (t as f64, top)], 3, 3, colour.stroke_width(1)))
            .map_err(|e| fail(&e))?
            .label(format!("{}: median time to settle, {} pulls", r.policy, tick(&(t as f64))))
            .legend(move |(x, y)| PathElement::new(vec![(x + 9, y - 6), (x + 9, y + 6)], colour.stroke_width(1)));
    }
    let steps = 200;
    let lr: Vec<(f64, f64)> = (0..=steps)
        .map(|i| {
            let t = horizon.powf(i as f64 / steps as f64);
            (t, c * t.ln())
        })
        .collect();
    chart
        .draw_series(DashedLineSeries::new(lr, 6, 4, BLACK.stroke_width(1)))
        .map_err(|e| fail(&e))?
        .label(format!("Lai–Robbins asymptotic rate C·ln t, C = {c:.2}"))
        .legend(|(x, y)| PathElement::new(vec![(x, y), (x + 18, y)], BLACK));
    chart
        .configure_series_labels()
        .position(SeriesLabelPosition::UpperLeft)
        .background_style(WHITE.mix(0.85))
        .border_style(BLACK.mix(0.4))
        .draw()
        .map_err(|e| fail(&e))?;
    root.present().map_err(|e| fail(&e))?;
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::core::RewardModel;
    use crate::sim::{simulate, SimSpec};

    fn report(arms: &[f64], horizon: u64) -> SimReport {
        let spec = SimSpec {
            arms: arms.to_vec(),
            reward: RewardModel::Bernoulli,
            policies: vec!["ucb1".parse().unwrap()],
            horizon,
            runs: 2,
            batch: 1,
            seed: 3,
            threads: 1,
            timing: None,
            settle: None,
        };
        simulate(&spec, &|_| {}).unwrap()
    }

    #[test]
    fn ticks_read_as_counts_grouped_by_thousands() {
        // Expected strings: common practice, no source.
        assert_eq!(tick(&10.0), "10");
        assert_eq!(tick(&1000.0), "1 000");
        assert_eq!(tick(&20_000.0), "20 000");
        assert_eq!(tick(&1_000_000.0), "1 000 000");
        assert_eq!(tick(&0.0), "0");
        assert_eq!(tick(&2.5), "2.5");
    }

    #[test]
    fn the_plot_draws_each_curve_through_dense_points_with_readable_ticks() {
        let r = report(&[0.05, 0.04], 2000);
        let path = std::env::temp_dir().join(format!("apportion-plot-{:016x}.svg", rand::random::<u64>()));
        plot(&r, &path).unwrap();
        let svg = std::fs::read_to_string(&path).unwrap();
        let _ = std::fs::remove_file(&path);
        let most_points = svg
            .split("<polyline")
            .skip(1)
            .filter_map(|el| el.split("points=\"").nth(1)?.split('"').next().map(|p| p.split_whitespace().count()))
            .max()
            .unwrap_or(0);
        assert!(most_points >= 50, "longest line has {most_points} points");
        let texts: Vec<&str> = svg
            .split("<text")
            .skip(1)
            .filter_map(|el| el.split_once('>')?.1.split("</text>").next().map(str::trim))
            .collect();
        assert!(texts.contains(&"1 000") && !texts.contains(&"10.0") && !texts.contains(&"1.0"), "{texts:?}");
        assert!(texts.iter().any(|t| t.starts_with("Lai–Robbins asymptotic rate")), "{texts:?}");
    }

    #[test]
    fn the_json_checkpoints_stay_at_powers_of_ten_and_the_horizon() {
        let r = report(&[0.05, 0.04], 2000);
        let ts: Vec<u64> = r.results[0].checkpoints.iter().map(|c| c.t).collect();
        assert_eq!(ts, [10, 100, 1000, 2000]);
    }

    #[test]
    fn equal_arms_print_a_constant_of_zero_not_minus_zero() {
        let r = report(&[0.05, 0.05], 100);
        assert!(r.lai_robbins_constant == 0.0 && r.lai_robbins_constant.is_sign_positive());
        let t = table(&r);
        assert!(t.contains("C = 0.000") && !t.contains("-0.0"), "{t}");
    }

    #[test]
    fn a_plot_file_not_ending_in_svg_is_refused() {
        assert!(check_plot_path(Path::new("regret.svg")).is_ok());
        assert!(check_plot_path(Path::new("REGRET.SVG")).is_ok());
        for bad in ["regret.png", "regret", "regret.svg.png"] {
            let e = check_plot_path(Path::new(bad)).unwrap_err();
            assert!(e.contains(bad) && e.contains(".svg"), "{e}");
        }
    }
}
