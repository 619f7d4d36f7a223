//! `mean`: predicts the fitting rows' mean target; the baseline every run includes.

use super::{Design, Fitted, Model, Params, encode::Notes};
use crate::error::Result;

pub struct MeanModel;

impl Model for MeanModel {
    fn fit(&self, _x: &Design, y: &[f64], _params: &Params, _notes: &mut Notes) -> Result<Fitted> {
        Ok(Fitted::Mean {
            value: y.iter().sum::<f64>() / y.len().max(1) as f64,
        })
    }
    fn drops_first_level(&self) -> bool {
        true
    }
    fn complexity(&self, _params: &Params) -> f64 {
        0.0
    }
}
