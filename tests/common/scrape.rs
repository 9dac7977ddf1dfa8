//! Reading the sidecar's answers: series of a Prometheus scrape, totals of `/experiments`.

use std::collections::BTreeMap;

/// The value of series `name` carrying every label pair in `labels`, from a scrape.
pub fn metric(scrape: &str, name: &str, labels: &[(&str, &str)]) -> Option<f64> {
    scrape.lines().filter(|l| !l.starts_with('#')).find_map(|l| {
        let (series, value) = l.rsplit_once(' ')?;
        let (n, rest) = series.split_once('{').unwrap_or((series, ""));
        if n != name || !labels.iter().all(|(k, v)| rest.contains(&format!("{k}=\"{v}\""))) {
            return None;
        }
        value.parse().ok()
    })
}

/// Sum of every series of `name` in a scrape.
pub fn metric_sum(scrape: &str, name: &str) -> f64 {
    scrape
        .lines()
        .filter(|l| !l.starts_with('#'))
        .filter_map(|l| {
            let (series, value) = l.rsplit_once(' ')?;
            (series.split('{').next() == Some(name)).then(|| value.parse::<f64>().ok())?
        })
        .sum()
}

/// `apportion_events_total{outcome="applied"}` over both kinds, from a scrape.
pub fn applied_events(scrape: &str) -> f64 {
    ["impression", "reward"]
        .iter()
        .map(|kind| metric(scrape, "apportion_events_total", &[("kind", kind), ("outcome", "applied")]).unwrap_or(0.0))
        .sum()
}

/// Per experiment and arm, (pulls, reward) from an `/experiments` body.
pub fn totals(experiments_json: &str) -> BTreeMap<(String, String), (u64, f64)> {
    let v: serde_json::Value = serde_json::from_str(experiments_json).unwrap_or_default();
    let mut out = BTreeMap::new();
    if let Some(exps) = v.as_object() {
        for (exp, e) in exps {
            if let Some(arms) = e["arms"].as_object() {
                for (arm, a) in arms {
                    out.insert((exp.clone(), arm.clone()), (a["pulls"].as_u64().unwrap_or(0), a["reward"].as_f64().unwrap_or(0.0)));
                }
            }
        }
    }
    out
}
