//! Model families behind one small fit/predict trait, and the fitted models they produce.
//!
//! One file per family. Nothing here reads files, the clock or a global random source; every
//! fit sees only the fitting rows it is given (already encoded by `encode::Encoder`).

// Defined before the modules so each of them can use it.
/// Run `$body` compiled for the widest vector unit the CPU has. Every version performs the same
/// IEEE operations in the same order on each lane (Rust never fuses a multiply and an add), so
/// the bits are the same on every machine; only the speed differs.
macro_rules! widest {
    ($name:ident, fn($($arg:ident: $ty:ty),* $(,)?) -> $ret:ty, $body:ident) => {
        fn $name($($arg: $ty),*) -> $ret {
            #[cfg(target_arch = "x86_64")]
            {
                #[target_feature(enable = "avx512f")]
                fn wide512($($arg: $ty),*) -> $ret {
                    $body($($arg),*)
                }
                #[target_feature(enable = "avx2")]
                fn wide256($($arg: $ty),*) -> $ret {
                    $body($($arg),*)
                }
                if std::arch::is_x86_feature_detected!("avx512f") {
                    // SAFETY: the CPU has AVX-512F, checked on the line above.
                    return unsafe { wide512($($arg),*) };
                }
                if std::arch::is_x86_feature_detected!("avx2") {
                    // SAFETY: the CPU has AVX2, checked on the line above.
                    return unsafe { wide256($($arg),*) };
                }
            }
            $body($($arg),*)
        }
    };
}

pub mod elementary;
pub mod encode;
pub mod gram;
pub mod knn;
pub mod lasso;
pub mod linalg;
pub mod logistic;
pub mod mean;
pub mod ols;
pub mod poly;
pub mod ridge;

use crate::error::Result;
use crate::spec::{Family, ModelSpec, ParamValue};
use encode::Notes;
use linalg::Matrix;
use serde::{Deserialize, Serialize};

/// One grid point: parameter name -> value, names sorted.
pub type Params = Vec<(String, ParamValue)>;

/// Look a parameter up by name.
pub fn param<'a>(params: &'a Params, name: &str) -> Option<&'a ParamValue> {
    params.iter().find(|(n, _)| n == name).map(|(_, v)| v)
}

/// Encoded features with their column names.
#[derive(Debug, Clone)]
pub struct Design {
    pub x: Matrix,
    pub names: Vec<String>,
}

/// A polynomial term: design column `column` replaced by z, z^2 .. z^degree, z = (x - center) / scale.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct PolyTerm {
    pub column: usize,
    pub center: f64,
    pub scale: f64,
    pub degree: usize,
}

/// A fitted model, as stored in the ledger and applied by `predict`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub enum Fitted {
    /// Predicts one constant.
    Mean { value: f64 },
    /// intercept + x . weights, in the units of the encoded design (after any polynomial
    /// expansion of `poly`).
    Linear {
        intercept: f64,
        weights: Vec<f64>,
        poly: Option<PolyTerm>,
    },
    /// Mean target of the k nearest stored points (row-major, already standardized by
    /// `center`/`scale`); distance ties go to the lower stored row.
    Knn {
        k: usize,
        center: Vec<f64>,
        scale: Vec<f64>,
        points: Vec<f64>,
        targets: Vec<f64>,
        /// 0 for regression; else the class count, `targets` holding class indices, and the
        /// prediction is the vote fraction of each class.
        #[serde(default)]
        classes: usize,
    },
    /// Class probabilities fixed at the fitting rows' class shares.
    Prior { probs: Vec<f64> },
    /// Logistic regression on standardised features: one row of (intercept, weights) for the
    /// positive class (binary) or one per class (softmax).
    Logistic {
        center: Vec<f64>,
        scale: Vec<f64>,
        coef: Vec<Vec<f64>>,
        classes: usize,
    },
    /// An external command's model: nothing is kept; predicting refits by running the command
    /// (`runner::predict_with`).
    External,
}

impl Fitted {
    pub fn predict(&self, x: &Matrix) -> Vec<f64> {
        match self {
            Fitted::Mean { value } => vec![*value; x.rows],
            Fitted::Linear {
                intercept,
                weights,
                poly,
            } => {
                let expanded;
                let x = match poly {
                    Some(t) => {
                        expanded = poly::expand(x, t);
                        &expanded
                    }
                    None => x,
                };
                let mut out = vec![*intercept; x.rows];
                for (j, w) in weights.iter().enumerate() {
                    if *w != 0.0 {
                        for (o, v) in out.iter_mut().zip(x.col(j)) {
                            *o += w * v;
                        }
                    }
                }
                out
            }
            Fitted::Knn {
                k,
                center,
                scale,
                points,
                targets,
                classes,
            } => {
                let q = linalg::standardize(x, center, scale);
                knn::predict_many(points, targets, center.len(), &q, &[*k], *classes).remove(0)
            }
            Fitted::Prior { probs } => (0..x.rows).flat_map(|_| probs.iter().copied()).collect(),
            Fitted::Logistic {
                center,
                scale,
                coef,
                classes,
            } => logistic::probabilities_raw(x, center, scale, coef, *classes),
            // Never called: the runner runs the command instead.
            Fitted::External => Vec::new(),
        }
    }
}

/// The fit/predict contract every family meets.
pub trait Model: Send + Sync {
    /// Fit one grid point on the fitting rows.
    fn fit(&self, x: &Design, y: &[f64], params: &Params, notes: &mut Notes) -> Result<Fitted>;

    /// Fit every grid point on one fold and predict each of `targets`; returns
    /// `[grid point][target][row]`. Families override this when the grid shares work
    /// (one decomposition for all penalties, one neighbour search for all k).
    fn fit_predict_grid(
        &self,
        x: &Design,
        y: &[f64],
        grid: &[Params],
        targets: &[&Matrix],
        notes: &mut Notes,
    ) -> Result<Vec<Vec<Vec<f64>>>> {
        let mut out = Vec::with_capacity(grid.len());
        for p in grid {
            let f = self.fit(x, y, p, notes)?;
            out.push(targets.iter().map(|t| f.predict(t)).collect());
        }
        Ok(out)
    }

    /// As `fit_predict_grid`, handing each grid point's predictions to `each` as soon as they
    /// exist, so a long grid on many rows never holds every prediction at once. Families whose
    /// fits are cheap to keep (coefficients) override it.
    fn fit_predict_each(
        &self,
        x: &Design,
        y: &[f64],
        grid: &[Params],
        targets: &[&Matrix],
        notes: &mut Notes,
        each: &mut dyn FnMut(usize, Vec<Vec<f64>>) -> Result<()>,
    ) -> Result<()> {
        for (g, p) in self
            .fit_predict_grid(x, y, grid, targets, notes)?
            .into_iter()
            .enumerate()
        {
            each(g, p)?;
        }
        Ok(())
    }

    /// Whether categorical features drop their first level (linear models).
    fn drops_first_level(&self) -> bool;

    /// At most this many fitting rows are predicted for training scores (for families whose
    /// prediction on their own fitting rows is quadratic); `None`: all of them.
    fn train_rows_limit(&self) -> Option<usize> {
        None
    }

    /// Orders grid points from simplest to most complex, for the one-standard-error rule:
    /// a smaller key is simpler.
    fn complexity(&self, params: &Params) -> f64;
}

/// The model object for one `[[model]]` entry; `classes` is 0 for regression, else the number
/// of classes (predictions are then n x classes probabilities, row-major).
pub fn model_for(spec: &ModelSpec, classes: usize) -> Box<dyn Model> {
    match spec.family {
        Family::Mean => Box::new(mean::MeanModel { classes }),
        Family::Logistic => Box::new(logistic::Logistic { classes }),
        Family::Command => Box::new(ExternalModel),
        Family::Ols => Box::new(ols::Ols),
        Family::Ridge => Box::new(ridge::Ridge {
            standardize: spec.standardize,
        }),
        Family::Lasso => Box::new(lasso::Lasso {
            standardize: spec.standardize,
        }),
        Family::Poly => Box::new(poly::Poly),
        Family::Knn => Box::new(knn::Knn {
            standardize: spec.standardize,
            classes,
        }),
    }
}

/// Hand each already-fitted grid point's predictions for `targets` to `each`, one at a time.
pub(crate) fn emit(
    fits: &[Fitted],
    targets: &[&Matrix],
    each: &mut dyn FnMut(usize, Vec<Vec<f64>>) -> Result<()>,
) -> Result<()> {
    for (g, f) in fits.iter().enumerate() {
        each(g, targets.iter().map(|t| f.predict(t)).collect())?;
    }
    Ok(())
}

/// Gather what a `fit_predict_each` hands out into `[grid point][target][row]`.
pub(crate) fn collect(
    n: usize,
    run: impl FnOnce(&mut dyn FnMut(usize, Vec<Vec<f64>>) -> Result<()>) -> Result<()>,
) -> Result<Vec<Vec<Vec<f64>>>> {
    let mut out = vec![Vec::new(); n];
    run(&mut |g, p| {
        out[g] = p;
        Ok(())
    })?;
    Ok(out)
}

/// Stands in for an external command inside the grid machinery; the runner runs the command.
pub struct ExternalModel;

impl Model for ExternalModel {
    fn fit(&self, _x: &Design, _y: &[f64], _params: &Params, _notes: &mut Notes) -> Result<Fitted> {
        Ok(Fitted::External)
    }
    fn drops_first_level(&self) -> bool {
        false
    }
    fn complexity(&self, _params: &Params) -> f64 {
        // No known order: the one-SE rule keeps the best command candidate.
        0.0
    }
}

/// Center (and optionally scale) columns: the means and scales used, and the result.
pub(crate) fn center_scale(x: &Matrix, scale: bool) -> (Vec<f64>, Vec<f64>, Matrix) {
    let (mean, sd) = linalg::mean_sd(x);
    let sc = if scale { sd } else { vec![1.0; x.cols] };
    let z = linalg::standardize(x, &mean, &sc);
    (mean, sc, z)
}

/// y minus its mean, divided by its largest magnitude (so 1e300-sized targets do not overflow
/// squared sums); returns (mean, scale, scaled).
pub(crate) fn center_target(y: &[f64]) -> (f64, f64, Vec<f64>) {
    let mean = y.iter().sum::<f64>() / y.len().max(1) as f64;
    let big = y.iter().fold(0.0f64, |m, v| m.max((v - mean).abs()));
    let scale = if big > 0.0 && big.is_finite() {
        big
    } else {
        1.0
    };
    (mean, scale, y.iter().map(|v| (v - mean) / scale).collect())
}

/// Turn weights on centered/scaled columns back into an intercept and original-unit weights.
pub(crate) fn unscale(
    v: &[f64],
    ymean: f64,
    yscale: f64,
    xmean: &[f64],
    xscale: &[f64],
) -> (f64, Vec<f64>) {
    let w: Vec<f64> = v.iter().zip(xscale).map(|(v, s)| v * yscale / s).collect();
    let b = ymean - w.iter().zip(xmean).map(|(w, m)| w * m).sum::<f64>();
    (b, w)
}

#[cfg(test)]
mod tests;
