//! Feature encoding fitted on the fitting rows of one fold: one-hot levels, mean imputation.
//!
//! The encoder is part of the fitted model, so prediction on new rows applies exactly what was
//! learned; nothing here ever looks at rows outside the ones it is fitted on.

use super::linalg::Matrix;
use crate::data::{MISSING_CODE, Table, Values};
use crate::error::{Error, Result};
use serde::{Deserialize, Serialize};
use std::collections::BTreeMap;

/// Messages collected while fitting or predicting, counted so repeats print once.
pub type Notes = BTreeMap<String, usize>;

pub fn note(notes: &mut Notes, msg: String) {
    *notes.entry(msg).or_insert(0) += 1;
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub enum Feature {
    /// A numeric column; `fill` is the fitting rows' mean, used for missing cells when imputing.
    Numeric { name: String, fill: f64 },
    /// One 0/1 column per kept level; `fill` holds the levels' shares in the fitting rows,
    /// used for a missing cell when imputing (the mean of each indicator).
    /// `baseline` is the dropped first level (linear models), encoded as all zeros.
    Categorical {
        name: String,
        levels: Vec<String>,
        fill: Vec<f64>,
        baseline: Option<String>,
    },
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Encoder {
    pub features: Vec<Feature>,
    /// Missing cells take the fitted means (`missing = "mean"`); otherwise they are an error.
    pub impute: bool,
}

impl Encoder {
    /// Learn levels and means from `rows` of the named columns. `drop_first` leaves out the first
    /// level of each categorical column (linear models, to avoid collinearity with the intercept).
    pub fn fit(
        table: &Table,
        columns: &[usize],
        rows: &[usize],
        drop_first: bool,
        impute: bool,
    ) -> Encoder {
        let mut features = Vec::with_capacity(columns.len());
        for &c in columns {
            let col = &table.columns[c];
            match &col.values {
                Values::Numeric(v) => {
                    // The mean of the present values, summed in row order from -0.0 (as
                    // `Iterator::sum` does), without a copy of the column.
                    let (mut sum, mut n) = (-0.0f64, 0usize);
                    for &r in rows {
                        let x = v[r];
                        if !x.is_nan() {
                            sum += x;
                            n += 1;
                        }
                    }
                    let fill = if n == 0 { 0.0 } else { sum / n as f64 };
                    features.push(Feature::Numeric {
                        name: col.name.clone(),
                        fill,
                    });
                }
                Values::Text { codes, levels } => {
                    let mut counts: BTreeMap<u32, usize> = BTreeMap::new();
                    for &r in rows {
                        if codes[r] != MISSING_CODE {
                            *counts.entry(codes[r]).or_insert(0) += 1;
                        }
                    }
                    let total: usize = counts.values().sum();
                    let mut kept: Vec<(String, f64)> = counts
                        .iter()
                        .map(|(&code, &n)| {
                            (
                                levels[code as usize].clone(),
                                n as f64 / total.max(1) as f64,
                            )
                        })
                        .collect();
                    let baseline = if drop_first && !kept.is_empty() {
                        Some(kept.remove(0).0)
                    } else {
                        None
                    };
                    features.push(Feature::Categorical {
                        name: col.name.clone(),
                        levels: kept.iter().map(|k| k.0.clone()).collect(),
                        fill: kept.iter().map(|k| k.1).collect(),
                        baseline,
                    });
                }
            }
        }
        Encoder { features, impute }
    }

    /// Names of the encoded columns (`col` or `col=level`).
    pub fn names(&self) -> Vec<String> {
        let mut out = Vec::new();
        for f in &self.features {
            match f {
                Feature::Numeric { name, .. } => out.push(name.clone()),
                Feature::Categorical { name, levels, .. } => {
                    out.extend(levels.iter().map(|l| format!("{name}={l}")))
                }
            }
        }
        out
    }

    /// Encode `rows` of `table` (which may be another file with the same column names).
    pub fn transform(&self, table: &Table, rows: &[usize], notes: &mut Notes) -> Result<Matrix> {
        let n = rows.len();
        let mut cols: Vec<Vec<f64>> = Vec::new();
        for f in &self.features {
            let name = match f {
                Feature::Numeric { name, .. } | Feature::Categorical { name, .. } => name,
            };
            let col = table.column(name).ok_or_else(|| {
                Error::data(
                    &table.path,
                    Some(1),
                    None,
                    format!(
                        "the model needs column '{name}', which this file lacks{}",
                        table.suggest(name)
                    ),
                )
            })?;
            let missing = |r: usize| -> Error {
                Error::data(
                    &table.path,
                    Some(table.lines[r]),
                    Some(name),
                    "missing value; the model was fitted with missing = \"error\" (use \"mean\" or \"drop-rows\" in the spec)",
                )
            };
            match (f, &col.values) {
                (Feature::Numeric { fill, .. }, Values::Numeric(v)) => {
                    let mut out = Vec::with_capacity(n);
                    for &r in rows {
                        let x = v[r];
                        if x.is_nan() {
                            if !self.impute {
                                return Err(missing(r));
                            }
                            out.push(*fill);
                        } else {
                            out.push(x);
                        }
                    }
                    cols.push(out);
                }
                (
                    Feature::Categorical {
                        levels,
                        fill,
                        baseline,
                        ..
                    },
                    Values::Text {
                        codes,
                        levels: file_levels,
                    },
                ) => {
                    // Map this file's codes onto the fitted levels once, not per row.
                    let map: Vec<Option<usize>> = file_levels
                        .iter()
                        .map(|l| levels.binary_search(l).ok())
                        .collect();
                    let first = cols.len();
                    cols.extend((0..levels.len()).map(|_| vec![0.0; n]));
                    let mut unseen = 0usize;
                    for (i, &r) in rows.iter().enumerate() {
                        if codes[r] == MISSING_CODE {
                            if !self.impute {
                                return Err(missing(r));
                            }
                            for (l, share) in fill.iter().enumerate() {
                                cols[first + l][i] = *share;
                            }
                        } else if let Some(l) = map[codes[r] as usize] {
                            cols[first + l][i] = 1.0;
                        } else if baseline.as_deref()
                            != Some(file_levels[codes[r] as usize].as_str())
                        {
                            unseen += 1;
                        }
                    }
                    if unseen > 0 {
                        note(
                            notes,
                            format!(
                                "column '{name}': rows with a level not seen in the fitting rows were encoded as all zeros"
                            ),
                        );
                    }
                }
                (Feature::Numeric { .. }, Values::Text { .. }) => {
                    return Err(Error::data(
                        &table.path,
                        None,
                        Some(name),
                        "the model was fitted on numbers but this column holds text",
                    ));
                }
                (Feature::Categorical { levels, .. }, Values::Numeric(v)) => {
                    // A column of digits read as numbers in another file: match by text.
                    let first = cols.len();
                    cols.extend((0..levels.len()).map(|_| vec![0.0; n]));
                    for (i, &r) in rows.iter().enumerate() {
                        let t = format!("{}", v[r]);
                        if let Ok(l) = levels.binary_search(&t) {
                            cols[first + l][i] = 1.0;
                        }
                    }
                }
            }
        }
        Ok(Matrix::from_cols(n, &cols))
    }
}
