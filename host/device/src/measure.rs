//! Readings averaged at the bench.

use fringe_calibration::Cx;
use fringe_link::{Link, LinkError};
use fringe_protocol::{Flags, Request, Response, N_FREQ};

/// Mean admittances (S) and permittivities per frequency, mean temperature
/// (C), and the flags any of the readings carried.
pub type Averaged = ([Cx<f64>; N_FREQ], [Cx<f64>; N_FREQ], f64, Flags);

/// Averages `n` readings (at least one; Measure requests) into admittances
/// and permittivities per frequency and the mean temperature.
///
/// # Errors
/// [`LinkError`] (another answer than a reading: [`LinkError::Unexpected`]).
pub fn averaged_reading(link: &mut Link, n: u32) -> Result<Averaged, LinkError> {
    let n = n.max(1);
    let mut y = [Cx::new(0.0, 0.0); N_FREQ];
    let mut eps = [Cx::new(0.0, 0.0); N_FREQ];
    let mut t = 0.0;
    let mut flags = Flags::empty();
    for _ in 0..n {
        let r = match link.request(Request::Measure)? {
            Response::Reading(r) => r,
            other => {
                return Err(LinkError::Unexpected {
                    request: "Measure",
                    got: format!("{other:?}"),
                })
            }
        };
        for k in 0..N_FREQ {
            y[k] += Cx::new(f64::from(r.channels[k].g_s), f64::from(r.channels[k].b_s));
            eps[k] += Cx::new(
                f64::from(r.channels[k].eps_re),
                f64::from(r.channels[k].eps_im),
            );
        }
        t += f64::from(r.temperature_c);
        flags |= r.flags;
    }
    let n = f64::from(n);
    Ok((y.map(|v| v / n), eps.map(|v| v / n), t / n, flags))
}
