//! What `apportion experiment list` prints: a table for people, or one JSON array.

use super::command::Listed;
use crate::console::Unwritable;
use crate::sayln;

/// Prints `rows` as a table (or JSON with `json`).
pub fn print(rows: &[Listed], json: bool) -> Result<(), Unwritable> {
    if json {
        let text = serde_json::to_string_pretty(rows).unwrap_or_else(|_| "[]".into());
        return sayln!("{text}");
    }
    if rows.is_empty() {
        return sayln!("no experiments: none defined, declared or published");
    }
    let now = crate::clock::now_ms();
    let header = ["EXPERIMENT", "STATE", "REVISION", "ARMS", "LEADER", "VERSION", "PUBLISHED"].map(String::from);
    let mut table: Vec<[String; 7]> = vec![header];
    for r in rows {
        let p = r.published.as_ref();
        table.push([
            r.experiment.clone(),
            r.state.clone(),
            r.revision.to_string(),
            if r.arms.is_empty() { "-".into() } else { r.arms.join(",") },
            p.and_then(|p| p.leader.clone()).unwrap_or_else(|| "-".into()),
            p.map_or("-".into(), |p| p.version.to_string()),
            p.and_then(|p| p.published_at_ms).map_or("never".into(), |t| ago(now - t)),
        ]);
    }
    let widths: Vec<usize> = (0..7).map(|c| table.iter().map(|row| row[c].chars().count()).max().unwrap_or(0)).collect();
    for row in &table {
        let line: Vec<String> = row.iter().zip(&widths).map(|(cell, w)| format!("{cell:<w$}")).collect();
        sayln!("{}", line.join("  ").trim_end())?;
    }
    Ok(())
}

/// "12 s ago", "5 min ago", "3 h ago", "2 d ago".
fn ago(ms: i64) -> String {
    let s = ms.max(0) / 1000;
    match s {
        0..=119 => format!("{s} s ago"),
        120..=7199 => format!("{} min ago", s / 60),
        7200..=172_799 => format!("{} h ago", s / 3600),
        _ => format!("{} d ago", s / 86_400),
    }
}

#[cfg(test)]
mod tests {
    #[test]
    fn ages_read_in_the_unit_people_use() {
        assert_eq!(super::ago(5_000), "5 s ago");
        assert_eq!(super::ago(600_000), "10 min ago");
        assert_eq!(super::ago(3 * 3_600_000), "3 h ago");
        assert_eq!(super::ago(-5), "0 s ago");
    }
}
