//! `mean`: predicts the fitting rows' mean target (regression) or their class shares
//! (classification, predicting the majority class, ties to the first); the baseline every run
//! includes.

use super::{Design, Fitted, Model, Params, encode::Notes};
use crate::error::Result;

pub struct MeanModel {
    pub classes: usize,
}

impl Model for MeanModel {
    fn fit(&self, _x: &Design, y: &[f64], _params: &Params, _notes: &mut Notes) -> Result<Fitted> {
        {
            if self.classes > 0 {
                let mut probs = vec![0.0; self.classes];
                for c in y {
                    probs[*c as usize] += 1.0;
                }
                for p in &mut probs {
                    *p /= y.len().max(1) as f64;
                }
                return Ok(Fitted::Prior { probs });
            }
            Ok(Fitted::Mean {
                value: y.iter().sum::<f64>() / y.len().max(1) as f64,
            })
        }
    }
    fn drops_first_level(&self) -> bool {
        true
    }
    fn complexity(&self, _params: &Params) -> f64 {
        0.0
    }
}
