//! The generic alternative a chemometrician would write in ten lines: a
//! quadratic ridge regression on log eps', log eps'' (loss ratios are their
//! differences) and temperature, standardised, the penalty by leave-one-out.
//! Written here for the tests and the zoo benchmark, apart from the
//! library's own multivariate model.

use fringe_calibration::fit::chemo::{alpha_grid, LinearModel, RidgePath};
use fringe_calibration::fit::product::{ChannelReading, Sample};
use nalgebra::DMatrix;

/// The baseline's features of one reading: the five base features and all
/// their squares and products (20).
pub fn features(ch: &[ChannelReading], t_c: f64) -> Vec<f64> {
    let mut c = ch.to_vec();
    c.sort_by(|a, b| a.freq_hz.total_cmp(&b.freq_hz));
    let base = [
        c[0].eps_re.ln(),
        c[1].eps_re.ln(),
        (c[0].eps_loss + 1e-3).ln(),
        (c[1].eps_loss + 1e-3).ln(),
        t_c,
    ];
    let mut f = base.to_vec();
    for i in 0..5 {
        for j in i..5 {
            f.push(base[i] * base[j]);
        }
    }
    f
}

/// The fitted baseline.
pub struct Baseline {
    model: LinearModel,
}

impl Baseline {
    /// Fits on `samples`.
    pub fn fit(samples: &[Sample]) -> Baseline {
        let rows: Vec<Vec<f64>> = samples
            .iter()
            .map(|s| features(&s.channels, s.temperature_c))
            .collect();
        let x = DMatrix::from_fn(rows.len(), rows[0].len(), |i, j| rows[i][j]);
        let y: Vec<f64> = samples.iter().map(|s| s.moisture_pct).collect();
        let path = RidgePath::new(&x, &y).expect("baseline design");
        let best = alpha_grid(y.len())
            .into_iter()
            .map(|a| {
                let press: f64 = path.at(a, &y).loo_residuals.iter().map(|e| e * e).sum();
                (press, a)
            })
            .min_by(|a, b| a.0.total_cmp(&b.0))
            .expect("grid");
        Baseline {
            model: path.model(best.1).0,
        }
    }

    /// Prediction for one reading.
    pub fn predict(&self, ch: &[ChannelReading], t_c: f64) -> f64 {
        self.model.predict(&features(ch, t_c))
    }
}
