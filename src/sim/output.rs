//! How simulation results are shown: a plain table, JSON, or an SVG plot.

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
        "Lai–Robbins constant C = {c:.3}; C·ln n at the horizon = {:.1}\n",
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
    s
}

/// Mean regret against t on a log axis, one line per policy with its standard error shaded,
/// and the Lai–Robbins line C·ln t.
pub fn plot(report: &SimReport, path: &Path) -> Result<(), String> {
    let fail = |e: &dyn std::fmt::Display| format!("cannot draw {}: {e}", path.display());
    let root = SVGBackend::new(path, (900, 560)).into_drawing_area();
    root.fill(&WHITE).map_err(|e| fail(&e))?;
    let horizon = report.horizon.max(10) as f64;
    let c = report.lai_robbins_constant;
    let top = report
        .results
        .iter()
        .flat_map(|r| r.checkpoints.iter().map(|p| p.regret_mean + p.regret_stderr))
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
        .draw()
        .map_err(|e| fail(&e))?;
    for (i, r) in report.results.iter().enumerate() {
        let colour = Palette99::pick(i).to_rgba();
        let mut pts: Vec<(f64, f64, f64)> = vec![(1.0, 0.0, 0.0)];
        pts.extend(r.checkpoints.iter().map(|p| (p.t as f64, p.regret_mean, p.regret_stderr)));
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
        .label(format!("Lai–Robbins C·ln t, C = {c:.2}"))
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
