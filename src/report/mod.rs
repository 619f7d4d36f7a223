//! Rendering of stored runs: comfy-table text and the `--json` documents. Everything here is
//! built from ledger rows, so what `run` prints is what the ledger holds.

pub mod export;
pub mod html;
pub mod json;
pub mod plot;
pub mod table;

/// A CSV cell a spreadsheet will not run as a formula: a text cell that starts with `=`, `+`,
/// `-`, `@`, a tab or a carriage return gets a leading `'` (numbers such as `-1.5` are left as
/// they are). The characters are those OWASP's "CSV Injection" page lists (from memory). For
/// `--spreadsheet-safe`, on header cells too; without it every cell is kept exactly.
pub fn spreadsheet_safe(cell: &str) -> std::borrow::Cow<'_, str> {
    let risky = cell.starts_with(['=', '+', '-', '@', '\t', '\r']);
    if risky && cell.trim().parse::<f64>().is_err() {
        std::borrow::Cow::Owned(format!("'{cell}"))
    } else {
        std::borrow::Cow::Borrowed(cell)
    }
}

/// A number with 6 significant digits for tables (JSON always carries the exact value).
pub fn num(v: Option<f64>) -> String {
    match v {
        None => "-".to_string(),
        Some(0.0) => "0".to_string(),
        Some(x) if x.abs() >= 1e-4 && x.abs() < 1e9 => {
            let digits = (6 - 1 - x.abs().log10().floor() as i32).max(0) as usize;
            format!("{x:.digits$}")
        }
        Some(x) => format!("{x:.5e}"),
    }
}

/// A run's candidates, best first by its selection metric (undefined scores last, ties by id).
pub fn ranked(d: &crate::ledger::RunDetail) -> Vec<&crate::ledger::CandidateRow> {
    let metric = d.summary.metric.as_str();
    let higher = crate::metrics::Metric::parse(metric).is_some_and(|m| m.higher_is_better());
    let mut rows: Vec<&crate::ledger::CandidateRow> = d.candidates.iter().collect();
    let key = |c: &crate::ledger::CandidateRow| c.validation.get(metric).and_then(|s| s.mean);
    rows.sort_by(|a, b| {
        let ord = match (key(a), key(b)) {
            (Some(x), Some(y)) => {
                if higher {
                    y.total_cmp(&x)
                } else {
                    x.total_cmp(&y)
                }
            }
            (Some(_), None) => std::cmp::Ordering::Less,
            (None, Some(_)) => std::cmp::Ordering::Greater,
            (None, None) => std::cmp::Ordering::Equal,
        };
        ord.then(a.id.cmp(&b.id))
    });
    rows
}

/// `name=value` pairs of a params JSON object.
pub fn params_text(p: &serde_json::Value) -> String {
    match p.as_object() {
        Some(m) if !m.is_empty() => m
            .iter()
            .map(|(k, v)| match v {
                serde_json::Value::String(s) => format!("{k}={s}"),
                other => format!("{k}={other}"),
            })
            .collect::<Vec<_>>()
            .join(" "),
        _ => String::new(),
    }
}

#[cfg(test)]
mod tests {
    #[test]
    fn formulas_are_defused_and_numbers_kept() {
        use super::spreadsheet_safe as safe;
        assert_eq!(safe("=HYPERLINK(\"x\")"), "'=HYPERLINK(\"x\")");
        assert_eq!(safe("+1+2"), "'+1+2");
        assert_eq!(safe("-cmd"), "'-cmd");
        assert_eq!(safe("@SUM(A1)"), "'@SUM(A1)");
        assert_eq!(safe("-1.5"), "-1.5");
        assert_eq!(safe("+3e-2"), "+3e-2");
        assert_eq!(safe("\t=1+1"), "'\t=1+1");
        assert_eq!(safe("\r=1+1"), "'\r=1+1");
        assert_eq!(safe("bay 4"), "bay 4");
        assert_eq!(safe(""), "");
    }

    use super::*;

    #[test]
    fn numbers_keep_six_significant_digits() {
        assert_eq!(num(Some(1.23456789)), "1.23457");
        assert_eq!(num(Some(1234.56789)), "1234.57");
        assert_eq!(num(Some(0.000123456789)), "0.000123457");
        assert_eq!(num(Some(1e-9)), "1.00000e-9");
        assert_eq!(num(None), "-");
    }
}
