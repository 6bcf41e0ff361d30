//! The quality gate a product calibration passes before it is written
//! (feature `fit`): the checks of issue 11, each refusal naming what failed
//! and by how much, so a person can act on it.
//!
//! | check | refused when | why |
//! | --- | --- | --- |
//! | [`Refusal::LowRpd`] | cross-validated RPD < 2 | RPD = SD(lab) / SEP; below 2 the calibration barely ranks samples (common practice in NIR calibration, no source) |
//! | [`Refusal::LowR2`] | cross-validated R^2 < 0.8 | the same question as a share of variance |
//! | [`Refusal::TooFewSamples`] | n < 5 x parameters | five samples per fitted parameter (common practice, no source); effective parameters for ridge and PLS; the relaxation model's regression coefficients and its mixing parameter |
//! | [`Refusal::RangeFromOneSample`] | one sample sets a valid range alone | its value stands apart from the rest by more than half the rest's span, so the range claims what one (perhaps wrong) sample shows |
//!
//! Values outside physical limits (temperature outside -40..150 C, eps'
//! below 1, negative loss) are input errors of the sample table, refused
//! before fitting (`fringe cal fit`), not gate refusals.

use core::fmt;

/// The gate's limits.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Limits {
    /// Lowest cross-validated RPD accepted.
    pub min_rpd: f64,
    /// Lowest cross-validated R^2 accepted.
    pub min_r2: f64,
    /// Samples needed per fitted parameter.
    pub samples_per_param: usize,
    /// A range end standing apart from the rest by more than this share of
    /// the rest's span is set by one sample.
    pub lone_gap: f64,
}

impl Default for Limits {
    /// RPD 2, R^2 0.8, five samples per parameter, gap 0.5.
    fn default() -> Self {
        Limits {
            min_rpd: 2.0,
            min_r2: 0.8,
            samples_per_param: 5,
            lone_gap: 0.5,
        }
    }
}

/// What the gate looks at (from a fit, or from a calibration file).
#[derive(Debug, Clone, PartialEq)]
pub struct GateInput<'a> {
    /// Samples in the fit.
    pub n: usize,
    /// Parameters fitted (effective ones for ridge and PLS; constant included).
    pub n_params: usize,
    /// Cross-validated RPD.
    pub rpd: f64,
    /// Cross-validated R^2.
    pub r2: f64,
    /// Per quantity whose range the calibration carries (e.g.
    /// `"moisture_pct"`, `"temperature_c"`): (sample id, value) of every
    /// sample. Empty when the samples are not at hand.
    pub ranges: Vec<(&'static str, Vec<(&'a str, f64)>)>,
}

/// One reason the gate refuses.
#[derive(Debug, Clone, PartialEq)]
#[non_exhaustive]
pub enum Refusal {
    /// Cross-validated RPD below the limit.
    LowRpd {
        /// The RPD.
        rpd: f64,
        /// The limit.
        min: f64,
    },
    /// Cross-validated R^2 below the limit.
    LowR2 {
        /// The R^2.
        r2: f64,
        /// The limit.
        min: f64,
    },
    /// Fewer samples than parameters x the limit.
    TooFewSamples {
        /// Samples.
        n: usize,
        /// Parameters.
        params: usize,
        /// Samples needed.
        needed: usize,
    },
    /// One sample alone sets an end of a valid range.
    RangeFromOneSample {
        /// Quantity.
        what: &'static str,
        /// Sample id.
        id: String,
        /// Its value.
        value: f64,
        /// The nearest value of the other samples.
        next: f64,
    },
}

impl fmt::Display for Refusal {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            Refusal::LowRpd { rpd, min } => write!(
                f,
                "cross-validated RPD {rpd:.2} is below {min}: the calibration barely tells the samples apart (more samples over a wider moisture range, or another model)"
            ),
            Refusal::LowR2 { r2, min } => write!(
                f,
                "cross-validated R^2 {r2:.3} is below {min} (more samples over a wider moisture range, or another model)"
            ),
            Refusal::TooFewSamples { n, params, needed } => write!(
                f,
                "{n} samples for {params} fitted parameters; {needed} needed (five per parameter): add reference samples"
            ),
            Refusal::RangeFromOneSample {
                what,
                id,
                value,
                next,
            } => write!(
                f,
                "the valid range of {what} reaches {value} only through sample {id:?} (the next is {next}): check that sample, or add samples in between"
            ),
        }
    }
}

/// Runs the gate; an empty list passes.
pub fn check(input: &GateInput<'_>, limits: &Limits) -> Vec<Refusal> {
    let mut out = Vec::new();
    if !(input.rpd >= limits.min_rpd) {
        out.push(Refusal::LowRpd {
            rpd: input.rpd,
            min: limits.min_rpd,
        });
    }
    if !(input.r2 >= limits.min_r2) {
        out.push(Refusal::LowR2 {
            r2: input.r2,
            min: limits.min_r2,
        });
    }
    let needed = input.n_params * limits.samples_per_param;
    if input.n < needed {
        out.push(Refusal::TooFewSamples {
            n: input.n,
            params: input.n_params,
            needed,
        });
    }
    for (what, values) in &input.ranges {
        if values.len() < 3 {
            continue;
        }
        let mut v: Vec<(&str, f64)> = values.clone();
        v.sort_by(|a, b| a.1.total_cmp(&b.1));
        let n = v.len();
        let (lo, lo2, hi2, hi) = (v[0], v[1], v[n - 2], v[n - 1]);
        for (end, next, rest_span) in [(hi, hi2, hi2.1 - lo.1), (lo, lo2, hi.1 - lo2.1)] {
            let gap = (end.1 - next.1).abs();
            // Where every other sample has one value, any gap is the one
            // sample's alone (found by review: 59 samples at 21.0 C and
            // one at 45.0 C set a temperature term from that one).
            if gap > 0.0 && (rest_span <= 0.0 || gap > limits.lone_gap * rest_span) {
                out.push(Refusal::RangeFromOneSample {
                    what,
                    id: end.0.to_string(),
                    value: end.1,
                    next: next.1,
                });
            }
        }
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    fn input(ranges: Vec<(&'static str, Vec<(&'static str, f64)>)>) -> GateInput<'static> {
        GateInput {
            n: 40,
            n_params: 5,
            rpd: 5.0,
            r2: 0.95,
            ranges,
        }
    }

    #[test]
    fn passes_a_good_calibration_and_names_each_refusal() {
        let even: Vec<(&str, f64)> = ["a", "b", "c", "d", "e"]
            .into_iter()
            .zip([10.0, 12.0, 14.0, 16.0, 18.0])
            .collect();
        assert!(check(
            &input(vec![("moisture_pct", even.clone())]),
            &Limits::default()
        )
        .is_empty());
        let mut bad = input(vec![]);
        bad.rpd = 1.5;
        bad.r2 = 0.5;
        bad.n = 20;
        let r = check(&bad, &Limits::default());
        assert_eq!(r.len(), 3, "{r:?}");
        assert!(r[0].to_string().contains("RPD 1.50 is below 2"));
        assert!(r[1].to_string().contains("R^2 0.500 is below 0.8"));
        assert!(r[2]
            .to_string()
            .contains("20 samples for 5 fitted parameters; 25 needed"));
        // The case: one row at 250 C among 5-40 C.
        let mut t = even;
        t.push(("absurd", 250.0));
        let r = check(&input(vec![("temperature_c", t)]), &Limits::default());
        assert_eq!(
            r,
            vec![Refusal::RangeFromOneSample {
                what: "temperature_c",
                id: "absurd".into(),
                value: 250.0,
                next: 18.0
            }]
        );
        assert!(r[0].to_string().contains("\"absurd\""));
        // Every other sample at one temperature (a conditioned lab), one
        // at 45 C: the range, and a temperature term, are that one's.
        let mut t: Vec<(&str, f64)> = ["a", "b", "c", "d", "e"]
            .into_iter()
            .map(|id| (id, 21.0))
            .collect();
        t.push(("warm", 45.0));
        let r = check(
            &input(vec![("temperature_c", t.clone())]),
            &Limits::default(),
        );
        assert_eq!(
            r,
            vec![Refusal::RangeFromOneSample {
                what: "temperature_c",
                id: "warm".into(),
                value: 45.0,
                next: 21.0
            }]
        );
        // All at one value: no range to come from one sample.
        t.pop();
        assert!(check(&input(vec![("temperature_c", t)]), &Limits::default()).is_empty());
        // NaN statistics refuse (never pass by accident).
        let mut nan = input(vec![]);
        nan.rpd = f64::NAN;
        assert_eq!(check(&nan, &Limits::default()).len(), 1);
    }
}
