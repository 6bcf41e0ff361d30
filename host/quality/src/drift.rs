//! Drift monitors: EWMA and two-sided tabular CUSUM control charts.
//!
//! Four things drift on a fringing-field sensor, and each has its own chart
//! and its own remedy ([`Quantity`]):
//!
//! | quantity | what is charted | unit | remedy |
//! | --- | --- | --- | --- |
//! | internal reference check | reference ratio / its cell-calibration baseline - 1 | % | check the front end, recalibrate the cell |
//! | lab residual | lab moisture - inline moisture at the same time | % moisture | bias-adjust with `cal adjust`, which tests the bias and the slope and writes a correction only where one is significant |
//! | empty-line baseline | eps' at the low frequency with no product | eps' | clean the window (a rise); recalibrate the cell (a drop) |
//!
//! The remedy follows the quantity and the direction, not the chart that
//! fired ([`Action::Recalibrate`] is not given by any monitor: a product
//! recalibration is for the engineer to decide from `cal adjust`'s slope).
//! | temperature | product temperature against the calibrated range | C | recalibrate over the wider range or restore the process temperature |
//!
//! ## Charts and their stated run lengths
//! Values are standardised, `z = (x - target) / sigma`, with `sigma` the
//! in-control standard deviation of one observation.
//!
//! * **Tabular CUSUM** (Page 1954; Montgomery, *Introduction to Statistical
//!   Quality Control*, sec. 9.1): `C+ = max(0, C+ + z - k)`,
//!   `C- = max(0, C- - z - k)`, alarm when either exceeds `h`. Default
//!   `k = 0.5`, `h = 5`: two-sided in-control ARL 465, ARL 10.4 at a 1-sigma
//!   shift (Montgomery's table for k = 1/2). [`CusumParams::arl`] computes
//!   the ARL by the integral-equation (Nystrom) method and the tests check it
//!   and a seeded simulation against that table.
//! * **EWMA** (Roberts 1959; Lucas and Saccucci, Technometrics 32(1), 1990):
//!   `w = lambda z + (1 - lambda) w`, alarm when `|w|` exceeds
//!   `L sqrt(lambda / (2 - lambda))` (the asymptotic limit, as in Lucas and
//!   Saccucci's tables). Default `lambda = 0.1`, `L = 2.814`: in-control ARL
//!   about 500, ARL 10.3 at a 1-sigma shift.
//!
//! After an alarm a chart restarts from zero, so a lasting shift alarms again
//! about every ARL(shift) observations; [`Alarm`]s are merged per episode by
//! the caller if wanted. The change point ("since when") is the last
//! observation at which the alarming statistic was zero (CUSUM, Montgomery
//! sec. 9.1.2) or on the far side of the centre line (EWMA); the size ("by how
//! much") is the mean of the standardised observations since then.

use serde::Serialize;

pub use crate::timefmt::fmt_time;

/// What a monitor watches.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Quantity {
    /// Internal reference check: ratio to its baseline, in % deviation.
    ReferenceCheck,
    /// Lab minus inline moisture, % moisture.
    LabResidual,
    /// Empty-line eps' at the low frequency (build-up on the window).
    EmptyBaseline,
    /// Product temperature against the calibrated range, C.
    Temperature,
}

impl Quantity {
    /// Words for a person.
    pub fn describe(self) -> &'static str {
        match self {
            Quantity::ReferenceCheck => "internal reference check",
            Quantity::LabResidual => "lab minus inline moisture",
            Quantity::EmptyBaseline => "empty-line baseline eps'",
            Quantity::Temperature => "product temperature",
        }
    }
    /// Unit of the charted value.
    pub fn unit(self) -> &'static str {
        match self {
            Quantity::ReferenceCheck => "% of baseline",
            Quantity::LabResidual => "% moisture",
            Quantity::EmptyBaseline => "eps'",
            Quantity::Temperature => "C",
        }
    }
}

/// What the plant should do about an alarm.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Action {
    /// Stop, lock out and clean the sensor window (build-up).
    CleanWindow,
    /// Apply a bias adjustment to the product calibration.
    BiasAdjust,
    /// Recalibrate the product calibration against new reference samples.
    Recalibrate,
    /// Check the front end and repeat the bench cell calibration.
    RecalibrateCell,
    /// Bring the process temperature back or recalibrate over the wider range.
    TemperatureRange,
}

impl Action {
    /// Advice for a person, with the line-work caution where one applies.
    pub fn advice(self) -> &'static str {
        match self {
            Action::CleanWindow => {
                "clean the sensor window (stop the line and lock it out first, per site procedure), then check the empty-line reading again"
            }
            Action::BiasAdjust => {
                "bias-adjust the product calibration by the lab-minus-inline mean with `fringe cal adjust` (confirm with further grab samples, and rule out window build-up first: see the empty-line baseline)"
            }
            Action::Recalibrate => {
                "recalibrate the product against new reference samples (the error is not a steady offset)"
            }
            Action::RecalibrateCell => {
                "check the front end and repeat the bench cell calibration; treat readings since the change as doubtful"
            }
            Action::TemperatureRange => {
                "bring the product temperature back into the calibrated range, or recalibrate with samples covering it"
            }
        }
    }
}

/// Tabular CUSUM parameters in units of the in-control standard deviation.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct CusumParams {
    /// Reference value (allowance) k, sigma.
    pub k: f64,
    /// Decision interval h, sigma.
    pub h: f64,
}

impl Default for CusumParams {
    /// k = 0.5, h = 5: two-sided ARL0 465, ARL 10.4 at 1 sigma (Montgomery).
    fn default() -> Self {
        Self { k: 0.5, h: 5.0 }
    }
}

/// EWMA parameters.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct EwmaParams {
    /// Smoothing weight lambda, 0 < lambda <= 1.
    pub lambda: f64,
    /// Width of the (asymptotic) control limits, in standard deviations of the EWMA.
    pub l: f64,
}

impl Default for EwmaParams {
    /// lambda = 0.1, L = 2.814: ARL0 about 500 (Lucas and Saccucci 1990).
    fn default() -> Self {
        Self {
            lambda: 0.1,
            l: 2.814,
        }
    }
}

impl EwmaParams {
    /// Asymptotic control limit on the standardised EWMA.
    pub fn limit(&self) -> f64 {
        self.l * (self.lambda / (2.0 - self.lambda)).sqrt()
    }

    /// Average run length at a mean shift of `shift_sigma` standard
    /// deviations, by the Nystrom solution of the EWMA run-length integral
    /// equation (Crowder, Technometrics 29, 1987) with `nodes` Gauss-Legendre
    /// points (100 is ample for lambda >= 0.05).
    pub fn arl(&self, shift_sigma: f64, nodes: usize) -> f64 {
        let c = self.limit();
        let lam = self.lambda;
        let (x, w) = gauss_legendre(nodes, -c, c);
        let n = x.len();
        // L(u) = 1 + (1/lambda) int_{-c}^{c} L(y) phi((y - (1-lambda) u)/lambda - delta) dy
        let mut a = nalgebra::DMatrix::<f64>::zeros(n, n);
        for i in 0..n {
            for j in 0..n {
                let arg = (x[j] - (1.0 - lam) * x[i]) / lam - shift_sigma;
                a[(i, j)] = -w[j] * normal_pdf(arg) / lam;
            }
            a[(i, i)] += 1.0;
        }
        let b = nalgebra::DVector::<f64>::from_element(n, 1.0);
        let sol = a.lu().solve(&b).unwrap_or(b);
        // ARL from a zero start: interpolate with the integral equation itself.
        1.0 + (0..n)
            .map(|j| w[j] * normal_pdf(x[j] / lam - shift_sigma) / lam * sol[j])
            .sum::<f64>()
    }
}

impl CusumParams {
    /// Average run length of the one-sided upper CUSUM started at zero, at a
    /// mean shift of `shift_sigma`, by the Nystrom solution of the run-length
    /// integral equation (Page 1954; Brook and Evans, Biometrika 59, 1972,
    /// give the Markov-chain form) with `nodes` Gauss-Legendre points.
    pub fn arl_one_sided(&self, shift_sigma: f64, nodes: usize) -> f64 {
        let (k, h, d) = (self.k, self.h, shift_sigma);
        let (y, w) = gauss_legendre(nodes, 0.0, h);
        // Unknowns: L(0), L(y_1..y_n).
        let n = y.len() + 1;
        let u = |i: usize| if i == 0 { 0.0 } else { y[i - 1] };
        let mut a = nalgebra::DMatrix::<f64>::zeros(n, n);
        for i in 0..n {
            let ui = u(i);
            a[(i, 0)] -= normal_cdf(k - ui - d);
            for j in 1..n {
                a[(i, j)] -= w[j - 1] * normal_pdf(y[j - 1] + k - ui - d);
            }
            a[(i, i)] += 1.0;
        }
        let b = nalgebra::DVector::<f64>::from_element(n, 1.0);
        let sol = a.lu().solve(&b).unwrap_or(b);
        sol[0]
    }

    /// Two-sided ARL at a shift of `shift_sigma`: 1/ARL = 1/ARL+ + 1/ARL-
    /// (exact for the two-sided tabular CUSUM when k > 0 and both sides start
    /// at zero, as used in Montgomery's table).
    pub fn arl(&self, shift_sigma: f64, nodes: usize) -> f64 {
        let up = self.arl_one_sided(shift_sigma, nodes);
        let down = self.arl_one_sided(-shift_sigma, nodes);
        1.0 / (1.0 / up + 1.0 / down)
    }
}

/// Standard normal density.
fn normal_pdf(x: f64) -> f64 {
    (-0.5 * x * x).exp() / (2.0 * std::f64::consts::PI).sqrt()
}

/// Standard normal distribution function (libm's `erfc`, accurate in the tails).
fn normal_cdf(x: f64) -> f64 {
    0.5 * libm::erfc(-x / std::f64::consts::SQRT_2)
}

/// Gauss-Legendre nodes and weights on `[a, b]` (Newton iteration on the
/// Legendre polynomial; Abramowitz and Stegun 25.4.29).
fn gauss_legendre(n: usize, a: f64, b: f64) -> (Vec<f64>, Vec<f64>) {
    let mut x = vec![0.0; n];
    let mut w = vec![0.0; n];
    let (mid, half) = ((a + b) / 2.0, (b - a) / 2.0);
    for i in 0..n.div_ceil(2) {
        let mut z = (std::f64::consts::PI * (i as f64 + 0.75) / (n as f64 + 0.5)).cos();
        let mut dp = 1.0;
        for _ in 0..100 {
            let (mut p0, mut p1) = (1.0, z);
            for m in 2..=n {
                let p2 = ((2 * m - 1) as f64 * z * p1 - (m - 1) as f64 * p0) / m as f64;
                p0 = p1;
                p1 = p2;
            }
            if n == 1 {
                p0 = 1.0;
                p1 = z;
            }
            dp = n as f64 * (z * p1 - p0) / (z * z - 1.0);
            let dz = p1 / dp;
            z -= dz;
            if dz.abs() < 1e-15 {
                break;
            }
        }
        x[i] = mid - half * z;
        x[n - 1 - i] = mid + half * z;
        w[i] = 2.0 * half / ((1.0 - z * z) * dp * dp);
        w[n - 1 - i] = w[i];
    }
    (x, w)
}

/// Which chart raised an alarm.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum ChartKind {
    /// Tabular CUSUM.
    Cusum,
    /// EWMA.
    Ewma,
}

impl ChartKind {
    /// The chart's name for people: `CUSUM`, `EWMA`.
    pub fn name(self) -> &'static str {
        match self {
            ChartKind::Cusum => "CUSUM",
            ChartKind::Ewma => "EWMA",
        }
    }
}

/// Direction of a shift.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Direction {
    /// Mean above target.
    Up,
    /// Mean below target.
    Down,
}

/// One observation: a time (ms since the Unix epoch) and a value in the
/// quantity's unit.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct Obs {
    /// Time of the observation, ms since the Unix epoch.
    pub time_ms: i64,
    /// Value in the quantity's unit.
    pub value: f64,
}

/// What a monitor compares against.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct Monitor {
    /// What is watched.
    pub quantity: Quantity,
    /// In-control mean (for temperature: unused, see `range`).
    pub target: f64,
    /// In-control standard deviation of one observation, > 0.
    pub sigma: f64,
    /// Calibrated range (temperature only): the CUSUMs run one-sided from its edges.
    pub range: Option<(f64, f64)>,
    /// CUSUM parameters.
    pub cusum: CusumParams,
    /// EWMA parameters.
    pub ewma: EwmaParams,
}

/// A raised alarm.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Alarm {
    /// What drifted.
    pub quantity: Quantity,
    /// Which chart saw it.
    pub chart: ChartKind,
    /// Up or down.
    pub direction: Direction,
    /// Index of the observation that raised the alarm.
    pub index: usize,
    /// Its time, ms since the Unix epoch.
    pub time_ms: i64,
    /// Index of the estimated first observation after the change.
    pub since_index: usize,
    /// Its time, ms.
    pub since_ms: i64,
    /// Estimated shift of the mean since then, in the quantity's unit
    /// (temperature: distance beyond the range edge).
    pub shift: f64,
    /// The same in standard deviations.
    pub shift_sigma: f64,
    /// What to do.
    pub action: Action,
}

impl Alarm {
    /// One line for a person: what, since when, by how much, what to do.
    pub fn message(&self) -> String {
        let dir = match self.direction {
            Direction::Up => "up",
            Direction::Down => "down",
        };
        let what = if self.quantity == Quantity::Temperature {
            let side = if self.direction == Direction::Up {
                "above"
            } else {
                "below"
            };
            format!(
                "{} {:.2} {} {} the calibrated range",
                self.quantity.describe(),
                self.shift.abs(),
                self.quantity.unit(),
                side
            )
        } else {
            format!(
                "{} drifted {} by {:.3} {} ({:.1} sigma)",
                self.quantity.describe(),
                dir,
                self.shift.abs(),
                self.quantity.unit(),
                self.shift_sigma.abs()
            )
        };
        format!(
            "{what} since {} (observation {}), flagged by the {} chart at {} (observation {}): {}",
            crate::timefmt::fmt_person(self.since_ms),
            self.since_index,
            self.chart.name(),
            crate::timefmt::fmt_person(self.time_ms),
            self.index,
            self.action.advice()
        )
    }
}

/// The charts' statistics at every observation (for plots) and the alarms.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Trace {
    /// The monitor that produced it.
    pub monitor: Monitor,
    /// The observations.
    pub obs: Vec<Obs>,
    /// Upper CUSUM C+ after each observation, sigma.
    pub cusum_hi: Vec<f64>,
    /// Lower CUSUM C- after each observation, sigma.
    pub cusum_lo: Vec<f64>,
    /// Standardised EWMA after each observation (empty for temperature).
    pub ewma: Vec<f64>,
    /// Alarms in time order.
    pub alarms: Vec<Alarm>,
    /// The alarms merged per episode ([`Trace::episodes`]).
    #[serde(skip)]
    pub episodes: Vec<Alarm>,
}

/// Action for a shift of `quantity` in `direction` (whichever chart found it).
fn action_for(quantity: Quantity, direction: Direction) -> Action {
    match quantity {
        Quantity::ReferenceCheck => Action::RecalibrateCell,
        Quantity::LabResidual => Action::BiasAdjust,
        Quantity::EmptyBaseline => match direction {
            // Build-up raises the empty reading; a drop is an electronics change.
            Direction::Up => Action::CleanWindow,
            Direction::Down => Action::RecalibrateCell,
        },
        Quantity::Temperature => Action::TemperatureRange,
    }
}

impl Monitor {
    /// A monitor with the default charts (CUSUM k 0.5 h 5, EWMA 0.1 / 2.814).
    pub fn new(quantity: Quantity, target: f64, sigma: f64) -> Self {
        Self {
            quantity,
            target,
            sigma,
            range: None,
            cusum: CusumParams::default(),
            ewma: EwmaParams::default(),
        }
    }

    /// Temperature monitor: one-sided CUSUMs from the edges of the
    /// calibrated range `[min_c, max_c]`, `sigma_c` the reading-to-reading
    /// noise. With the mean exactly at an edge each side has the one-sided
    /// in-control ARL (930 for the defaults); inside the range it is longer.
    pub fn temperature(min_c: f64, max_c: f64, sigma_c: f64) -> Self {
        Self {
            range: Some((min_c, max_c)),
            ..Self::new(Quantity::Temperature, (min_c + max_c) / 2.0, sigma_c)
        }
    }

    /// Runs both charts over `obs` (in time order): [`Running`] fed every
    /// observation, keeping the statistics of each for plots.
    ///
    /// A non-finite observation is skipped (it cannot move a chart). A
    /// `sigma` that is not positive gives no alarms and empty statistics.
    pub fn run(&self, obs: &[Obs]) -> Trace {
        let mut r = Running::new(*self, true);
        for o in obs {
            r.push(*o);
        }
        r.into_trace()
    }

    fn alarm_over(
        &self,
        chart: ChartKind,
        dir: Direction,
        (since_index, since_ms): (usize, i64),
        (index, time_ms): (usize, i64),
        sum: f64,
    ) -> Alarm {
        let mean = sum / (index - since_index + 1) as f64;
        let shift = match self.range {
            Some((min, max)) => match dir {
                Direction::Up => mean - max,
                Direction::Down => mean - min,
            },
            None => mean - self.target,
        };
        Alarm {
            quantity: self.quantity,
            chart,
            direction: dir,
            index,
            time_ms,
            since_index,
            since_ms,
            shift,
            shift_sigma: shift / self.sigma,
            action: action_for(self.quantity, dir),
        }
    }
}

/// Where an excursion of one chart began: index and time of its first
/// observation, and the sum of the values from there to the latest one
/// (in order, as the alarm's mean shift needs them).
#[derive(Debug, Clone, Copy, Default, PartialEq)]
struct Span {
    index: usize,
    time_ms: i64,
    sum: f64,
}

impl Span {
    fn start(index: usize, o: Obs) -> Self {
        Self {
            index,
            time_ms: o.time_ms,
            sum: o.value,
        }
    }
}

/// The latest episode of one direction, still open to the next alarm:
/// where it is in [`Running::episodes`], the index of its latest alarm and
/// its span from the change point to the latest observation.
#[derive(Debug, Clone, Copy, PartialEq)]
struct OpenEpisode {
    at: usize,
    latest: usize,
    span: Span,
}

/// A [`Monitor`] run one observation at a time: the charts' state, their
/// alarms merged per episode ([`Trace::episodes`]), and, when asked for,
/// the statistics of every observation (for plots). Without them it holds
/// a few numbers and the episodes, however many observations it is fed
/// (the live drift check of a device that runs for years).
#[derive(Debug, Clone, PartialEq)]
pub struct Running {
    monitor: Monitor,
    keep: bool,
    n: usize,
    hi: f64,
    lo: f64,
    w: f64,
    hi_span: Span,
    lo_span: Span,
    w_span: Span,
    trace: Trace,
    episodes: Vec<Alarm>,
    open: [Option<OpenEpisode>; 2],
}

impl Running {
    /// A monitor before its first observation; `keep`: keep the
    /// observations and the statistics after each (for [`Running::into_trace`]'s
    /// plots; without them the trace has only the alarms' episodes).
    pub fn new(monitor: Monitor, keep: bool) -> Self {
        Self {
            monitor,
            keep,
            n: 0,
            hi: 0.0,
            lo: 0.0,
            w: 0.0,
            hi_span: Span::default(),
            lo_span: Span::default(),
            w_span: Span::default(),
            trace: Trace {
                monitor,
                obs: Vec::new(),
                cusum_hi: Vec::new(),
                cusum_lo: Vec::new(),
                ewma: Vec::new(),
                alarms: Vec::new(),
                episodes: Vec::new(),
            },
            episodes: Vec::new(),
            open: [None, None],
        }
    }

    /// The monitor it runs.
    pub fn monitor(&self) -> &Monitor {
        &self.monitor
    }

    /// Observations charted so far.
    pub fn len(&self) -> usize {
        self.n
    }

    /// Whether no observation has been charted.
    pub fn is_empty(&self) -> bool {
        self.n == 0
    }

    /// Alarm episodes so far, oldest first ([`Trace::episodes`]).
    pub fn episodes(&self) -> &[Alarm] {
        &self.episodes
    }

    /// The trace: the statistics if kept, the alarms and the episodes.
    pub fn into_trace(self) -> Trace {
        let mut t = self.trace;
        t.episodes = self.episodes;
        t
    }

    /// Charts one observation (a non-finite one is skipped; nothing is
    /// charted where the monitor's sigma is not positive).
    pub fn push(&mut self, o: Obs) {
        let m = self.monitor;
        if !(m.sigma > 0.0 && m.sigma.is_finite() && o.value.is_finite()) {
            return;
        }
        let (k, h) = (m.cusum.k, m.cusum.h);
        let i = self.n;
        self.n += 1;
        if self.keep {
            self.trace.obs.push(o);
        }
        for e in self.open.iter_mut().flatten() {
            e.span.sum += o.value;
        }
        let (z_hi, z_lo) = match m.range {
            Some((min, max)) => ((o.value - max) / m.sigma, (min - o.value) / m.sigma),
            None => {
                let z = (o.value - m.target) / m.sigma;
                (z, -z)
            }
        };
        // Each excursion's span starts at the first observation after the
        // chart was last at zero.
        for (c, span) in [(self.hi, &mut self.hi_span), (self.lo, &mut self.lo_span)] {
            if c == 0.0 {
                *span = Span::start(i, o);
            } else {
                span.sum += o.value;
            }
        }
        self.hi = (self.hi + z_hi - k).max(0.0);
        self.lo = (self.lo + z_lo - k).max(0.0);
        if self.keep {
            self.trace.cusum_hi.push(self.hi);
            self.trace.cusum_lo.push(self.lo);
        }
        if self.hi > h || self.lo > h {
            let (dir, span) = if self.hi > h {
                (Direction::Up, self.hi_span)
            } else {
                (Direction::Down, self.lo_span)
            };
            self.raise(ChartKind::Cusum, dir, span, (i, o.time_ms));
            self.hi = 0.0;
            self.lo = 0.0;
        }
        if m.range.is_none() {
            let z = z_hi;
            let before = self.w;
            self.w = m.ewma.lambda * z + (1.0 - m.ewma.lambda) * self.w;
            if before.signum() != self.w.signum() || before == 0.0 {
                self.w_span = Span::start(i, o);
            } else {
                self.w_span.sum += o.value;
            }
            if self.keep {
                self.trace.ewma.push(self.w);
            }
            if self.w.abs() > m.ewma.limit() {
                let dir = if self.w > 0.0 {
                    Direction::Up
                } else {
                    Direction::Down
                };
                self.raise(ChartKind::Ewma, dir, self.w_span, (i, o.time_ms));
                self.w = 0.0;
            }
        }
    }

    /// An alarm at observation `at` over `span`, and its episode: an alarm
    /// that follows another of the same direction with no gap between
    /// their excursions (its change point at or before the observation
    /// after the previous alarm) is folded into that one's episode, which keeps its first
    /// chart, change point and time, and takes the mean shift from its
    /// change point to this alarm.
    fn raise(&mut self, chart: ChartKind, dir: Direction, span: Span, at: (usize, i64)) {
        let m = self.monitor;
        let a = m.alarm_over(chart, dir, (span.index, span.time_ms), at, span.sum);
        if self.keep {
            self.trace.alarms.push(a.clone());
        }
        let d = usize::from(dir == Direction::Down);
        if let Some(open) = self.open[d].as_mut() {
            if span.index <= open.latest + 1 {
                open.latest = at.0;
                let first = &mut self.episodes[open.at];
                let whole = m.alarm_over(
                    first.chart,
                    first.direction,
                    (open.span.index, open.span.time_ms),
                    at,
                    open.span.sum,
                );
                first.shift = whole.shift;
                first.shift_sigma = whole.shift_sigma;
                return;
            }
        }
        self.open[d] = Some(OpenEpisode {
            at: self.episodes.len(),
            latest: at.0,
            span,
        });
        self.episodes.push(a);
    }
}

impl Trace {
    /// Alarms merged per episode: an alarm that follows another of the same
    /// quantity and direction with no gap between their excursions (its
    /// change point at or before the previous alarm + 1) is folded into
    /// it, keeping the first alarm's chart, change point and time; its size
    /// is the mean shift from that change point to the latest alarm (the
    /// span it names, whichever chart raised the later alarms).
    pub fn episodes(&self) -> Vec<Alarm> {
        self.episodes.clone()
    }
}

/// Standard deviation from the average moving range, MR-bar / d2 with
/// d2 = 1.128 for ranges of two (Montgomery sec. 6.4): insensitive to a slow
/// trend, so it suits a baseline period that may already drift a little.
/// `None` for fewer than two finite values.
pub fn sigma_moving_range(values: &[f64]) -> Option<f64> {
    let v: Vec<f64> = values.iter().copied().filter(|x| x.is_finite()).collect();
    if v.len() < 2 {
        return None;
    }
    let mr = v.windows(2).map(|w| (w[1] - w[0]).abs()).sum::<f64>() / (v.len() - 1) as f64;
    Some(mr / 1.128)
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::{rngs::StdRng, RngExt, SeedableRng};
    use rand_distr::StandardNormal;

    /// The monitors as they were first written, over a whole series at
    /// once: the reference the one-at-a-time [`Running`] must equal.
    mod batch {
        use super::super::*;

        pub(super) fn run(m: &Monitor, obs: &[Obs]) -> Trace {
            let mut t = Trace {
                monitor: *m,
                obs: Vec::new(),
                cusum_hi: Vec::new(),
                cusum_lo: Vec::new(),
                ewma: Vec::new(),
                alarms: Vec::new(),
                episodes: Vec::new(),
            };
            if !(m.sigma > 0.0 && m.sigma.is_finite()) {
                return t;
            }
            let (k, h) = (m.cusum.k, m.cusum.h);
            let lim = m.ewma.limit();
            let lam = m.ewma.lambda;
            let (mut hi, mut lo, mut w) = (0.0f64, 0.0f64, 0.0f64);
            // Index (into t.obs) of the first observation of the current excursion.
            let (mut hi_start, mut lo_start, mut w_start) = (0usize, 0usize, 0usize);
            for o in obs.iter().copied().filter(|o| o.value.is_finite()) {
                let i = t.obs.len();
                t.obs.push(o);
                let (z_hi, z_lo) = match m.range {
                    Some((min, max)) => ((o.value - max) / m.sigma, (min - o.value) / m.sigma),
                    None => {
                        let z = (o.value - m.target) / m.sigma;
                        (z, -z)
                    }
                };
                if hi == 0.0 {
                    hi_start = i;
                }
                if lo == 0.0 {
                    lo_start = i;
                }
                hi = (hi + z_hi - k).max(0.0);
                lo = (lo + z_lo - k).max(0.0);
                if hi == 0.0 {
                    hi_start = i + 1;
                }
                if lo == 0.0 {
                    lo_start = i + 1;
                }
                t.cusum_hi.push(hi);
                t.cusum_lo.push(lo);
                if hi > h || lo > h {
                    let (dir, start) = if hi > h {
                        (Direction::Up, hi_start)
                    } else {
                        (Direction::Down, lo_start)
                    };
                    t.alarms
                        .push(alarm(m, &t.obs, ChartKind::Cusum, dir, start, i));
                    hi = 0.0;
                    lo = 0.0;
                    hi_start = i + 1;
                    lo_start = i + 1;
                }
                if m.range.is_none() {
                    let z = z_hi;
                    let before = w;
                    w = lam * z + (1.0 - lam) * w;
                    if before.signum() != w.signum() || before == 0.0 {
                        w_start = i;
                    }
                    t.ewma.push(w);
                    if w.abs() > lim {
                        let dir = if w > 0.0 {
                            Direction::Up
                        } else {
                            Direction::Down
                        };
                        t.alarms
                            .push(alarm(m, &t.obs, ChartKind::Ewma, dir, w_start, i));
                        w = 0.0;
                        w_start = i + 1;
                    }
                }
            }
            t
        }

        fn alarm(
            m: &Monitor,
            obs: &[Obs],
            chart: ChartKind,
            dir: Direction,
            start: usize,
            i: usize,
        ) -> Alarm {
            let start = start.min(i);
            let seg = &obs[start..=i];
            let mean = seg.iter().map(|o| o.value).sum::<f64>() / seg.len() as f64;
            let shift = match m.range {
                Some((min, max)) => match dir {
                    Direction::Up => mean - max,
                    Direction::Down => mean - min,
                },
                None => mean - m.target,
            };
            Alarm {
                quantity: m.quantity,
                chart,
                direction: dir,
                index: i,
                time_ms: obs[i].time_ms,
                since_index: start,
                since_ms: obs[start].time_ms,
                shift,
                shift_sigma: shift / m.sigma,
                action: action_for(m.quantity, dir),
            }
        }
        pub(super) fn episodes(t: &Trace) -> Vec<Alarm> {
            // (episode, index of its latest alarm)
            let mut out: Vec<(Alarm, usize)> = Vec::new();
            let mut sorted = t.alarms.clone();
            sorted.sort_by_key(|a| a.index);
            for a in sorted {
                if let Some((first, latest)) = out
                    .iter_mut()
                    .rev()
                    .find(|(l, _)| l.quantity == a.quantity && l.direction == a.direction)
                {
                    if a.since_index <= *latest + 1 {
                        *latest = a.index;
                        let span = alarm(
                            &t.monitor,
                            &t.obs,
                            first.chart,
                            first.direction,
                            first.since_index,
                            a.index,
                        );
                        first.shift = span.shift;
                        first.shift_sigma = span.shift_sigma;
                        continue;
                    }
                }
                let i = a.index;
                out.push((a, i));
            }
            out.into_iter().map(|(a, _)| a).collect()
        }
    }

    /// One observation at a time gives what the whole series at once gave:
    /// every statistic, alarm and episode, bit for bit, on series with
    /// steps, ramps, gaps (NaN) and spikes, for a centred monitor and a
    /// range monitor; and without the statistics kept, the same episodes.
    #[test]
    fn one_at_a_time_equals_the_whole_series_at_once() {
        let mut rng = StdRng::seed_from_u64(77);
        let (mut alarms, mut merged) = (0usize, 0usize);
        for case in 0..300u64 {
            let n = 50 + (case as usize * 37) % 900;
            let mut v = noise(1000 + case, n);
            for x in v.iter_mut().skip(n / 3) {
                *x += [0.0, 0.7, 1.5, -2.0, 3.0][case as usize % 5];
            }
            for (i, x) in v.iter_mut().enumerate().skip(2 * n / 3) {
                *x += 0.01 * (i - 2 * n / 3) as f64 * [1.0, -1.0][case as usize % 2];
            }
            for _ in 0..3 {
                let i = rng.random_range(0..n);
                v[i] = if case % 2 == 0 { f64::NAN } else { 12.0 };
            }
            let obs: Vec<Obs> = v
                .iter()
                .enumerate()
                .map(|(i, x)| Obs {
                    time_ms: 1_000 * i as i64 + 17,
                    value: *x,
                })
                .collect();
            let sigma = [1.0, 0.8, 1.3][case as usize % 3];
            for m in [
                Monitor::new(Quantity::EmptyBaseline, 0.1, sigma),
                Monitor::temperature(-0.5, 0.8, sigma),
            ] {
                let want = batch::run(&m, &obs);
                let got = m.run(&obs);
                assert_eq!(got.obs, want.obs, "case {case}");
                assert_eq!(got.cusum_hi, want.cusum_hi, "case {case}");
                assert_eq!(got.cusum_lo, want.cusum_lo, "case {case}");
                assert_eq!(got.ewma, want.ewma, "case {case}");
                assert_eq!(got.alarms, want.alarms, "case {case}");
                let episodes = batch::episodes(&want);
                alarms += want.alarms.len();
                merged += want.alarms.len() - episodes.len();
                assert_eq!(got.episodes(), episodes, "case {case}");
                let mut lean = Running::new(m, false);
                for o in &obs {
                    lean.push(*o);
                }
                assert_eq!(lean.episodes(), &episodes[..], "case {case}");
                let t = lean.into_trace();
                assert!(t.obs.is_empty() && t.alarms.is_empty() && t.cusum_hi.is_empty());
            }
        }
        // The series exercise both: alarms, and alarms merged into episodes.
        assert!(
            alarms > 1000 && merged > 300,
            "{alarms} alarms, {merged} merged"
        );
    }

    fn noise(seed: u64, n: usize) -> Vec<f64> {
        let mut rng = StdRng::seed_from_u64(seed);
        (0..n)
            .map(|_| rng.sample::<f64, _>(StandardNormal))
            .collect()
    }

    fn obs(values: &[f64]) -> Vec<Obs> {
        values
            .iter()
            .enumerate()
            .map(|(i, &value)| Obs {
                time_ms: 1_790_000_000_000 + i as i64 * 60_000,
                value,
            })
            .collect()
    }

    /// Run length of one chart kind (first alarm index + 1) on `n` values
    /// drawn as `mean(i) + N(0,1)`; None if no alarm.
    fn run_length(
        m: &Monitor,
        kind: ChartKind,
        seed: u64,
        n: usize,
        mean: impl Fn(usize) -> f64,
    ) -> Option<usize> {
        let v: Vec<f64> = noise(seed, n)
            .iter()
            .enumerate()
            .map(|(i, e)| mean(i) + e)
            .collect();
        m.run(&obs(&v))
            .alarms
            .iter()
            .find(|a| a.chart == kind)
            .map(|a| a.index + 1)
    }

    #[test]
    fn gauss_legendre_integrates_polynomials_exactly() {
        // An n-point rule is exact for degree 2n-1 (Abramowitz and Stegun 25.4.29).
        let (x, w) = gauss_legendre(5, 0.0, 2.0);
        let s: f64 = x.iter().zip(&w).map(|(x, w)| w * x.powi(9)).sum();
        assert!((s - 2f64.powi(10) / 10.0).abs() < 1e-9, "{s}");
    }

    #[test]
    fn cusum_arl_matches_montgomery_table() {
        // Montgomery, Introduction to Statistical Quality Control, table for the
        // two-sided tabular CUSUM with k = 1/2 (docs/REFERENCES.md sec. 9):
        // h = 4: ARL0 168, ARL(1 sigma) 8.38; h = 5: ARL0 465, ARL(1 sigma) 10.4.
        for (h, arl0, arl1) in [(4.0, 168.0, 8.38), (5.0, 465.0, 10.4)] {
            let p = CusumParams { k: 0.5, h };
            let a0 = p.arl(0.0, 64);
            let a1 = p.arl(1.0, 64);
            eprintln!("CUSUM k 0.5 h {h}: ARL0 {a0:.2}, ARL(1 sigma) {a1:.3}");
            assert!((a0 / arl0 - 1.0).abs() < 0.01, "h {h}: ARL0 {a0} vs {arl0}");
            assert!((a1 / arl1 - 1.0).abs() < 0.01, "h {h}: ARL1 {a1} vs {arl1}");
        }
    }

    #[test]
    fn ewma_arl_matches_lucas_saccucci() {
        // Lucas and Saccucci (1990), lambda 0.1, L 2.814: ARL0 about 500,
        // ARL(1 sigma) 10.3 (docs/REFERENCES.md sec. 9, marked [mem] there, and
        // reproduced here by the integral equation).
        let p = EwmaParams::default();
        let a0 = p.arl(0.0, 120);
        let a1 = p.arl(1.0, 120);
        eprintln!("EWMA 0.1/2.814: ARL0 {a0:.2}, ARL(1 sigma) {a1:.3}");
        assert!((a0 / 500.0 - 1.0).abs() < 0.01, "ARL0 {a0}");
        assert!((a1 / 10.3 - 1.0).abs() < 0.01, "ARL1 {a1}");
    }

    fn mean_run_length(kind: ChartKind, shift: f64, runs: u64, seed0: u64) -> f64 {
        let m = Monitor::new(Quantity::ReferenceCheck, 0.0, 1.0);
        let mut total = 0usize;
        for r in 0..runs {
            let seed = seed0 + r;
            // Draw only as far as needed: the same seed gives the same prefix.
            let mut n = if shift == 0.0 { 1500 } else { 60 };
            let rl = loop {
                if let Some(rl) = run_length(&m, kind, seed, n, |_| shift) {
                    break rl;
                }
                assert!(n < 1_000_000, "seed {seed}: no alarm in {n}");
                n *= 4;
            };
            total += rl;
        }
        total as f64 / runs as f64
    }

    #[test]
    fn simulated_run_lengths_match_the_tables() {
        // Seeded simulation of the charts as implemented, against the same
        // published values. 3000 in-control runs give a standard error of
        // about 1.8 % on the ARL0 (the run length is nearly geometric).
        let seed0 = 7_000;
        let c0 = mean_run_length(ChartKind::Cusum, 0.0, 3000, seed0);
        let c1 = mean_run_length(ChartKind::Cusum, 1.0, 3000, seed0);
        let e1 = mean_run_length(ChartKind::Ewma, 1.0, 3000, seed0);
        eprintln!("seed0 {seed0}: CUSUM ARL0 {c0:.1}, ARL1 {c1:.2}; EWMA ARL1 {e1:.2}");
        assert!(
            (c0 / 465.0 - 1.0).abs() < 0.07,
            "seed0 {seed0}: CUSUM ARL0 {c0}"
        );
        assert!(
            (c1 / 10.4 - 1.0).abs() < 0.05,
            "seed0 {seed0}: CUSUM ARL1 {c1}"
        );
        assert!(
            (e1 / 10.3 - 1.0).abs() < 0.05,
            "seed0 {seed0}: EWMA ARL1 {e1}"
        );
    }

    #[test]
    fn in_control_false_alarm_rate_is_the_stated_one() {
        // 200 000 in-control reference checks: both charts' false-alarm
        // rates lie near 1/ARL0 (465 and about 500).
        let seed = 42;
        let v = noise(seed, 200_000);
        let m = Monitor::new(Quantity::ReferenceCheck, 0.0, 1.0);
        let t = m.run(&obs(&v));
        let nc = t
            .alarms
            .iter()
            .filter(|a| a.chart == ChartKind::Cusum)
            .count() as f64;
        let ne = t
            .alarms
            .iter()
            .filter(|a| a.chart == ChartKind::Ewma)
            .count() as f64;
        let (rc, re) = (nc / v.len() as f64, ne / v.len() as f64);
        eprintln!(
            "seed {seed}: false-alarm rate CUSUM {rc:.5} (1/465 = {:.5}), EWMA {re:.5} (1/500)",
            1.0 / 465.0
        );
        assert!(
            (rc * 465.0 - 1.0).abs() < 0.15,
            "seed {seed}: CUSUM rate {rc}"
        );
        assert!(
            (re * 500.0 - 1.0).abs() < 0.15,
            "seed {seed}: EWMA rate {re}"
        );
    }

    #[test]
    fn step_in_reference_check_is_flagged_within_its_arl() {
        // A 1-sigma step at observation 200; ARL(1 sigma) is 10.4 (CUSUM)
        // and 10.3 (EWMA). Over 200 seeds the mean delay lies within 15 % of
        // that (the in-control start adds a little head start either way),
        // and the alarm's change point and size are near the truth.
        let m = Monitor::new(Quantity::ReferenceCheck, 0.0, 0.05);
        let (mut delays, mut n) = (0.0, 0);
        for seed in 0..200u64 {
            let v: Vec<f64> = noise(seed, 400)
                .iter()
                .enumerate()
                .map(|(i, e)| 0.05 * (e + if i >= 200 { 1.0 } else { 0.0 }))
                .collect();
            let t = m.run(&obs(&v));
            let Some(a) = t
                .alarms
                .iter()
                .find(|a| a.index >= 200 && a.chart == ChartKind::Cusum)
            else {
                panic!("seed {seed}: step not flagged");
            };
            assert_eq!(a.direction, Direction::Up, "seed {seed}");
            assert_eq!(a.action, Action::RecalibrateCell);
            delays += (a.index + 1 - 200) as f64;
            n += 1;
        }
        let mean = delays / n as f64;
        eprintln!("mean CUSUM delay after a 1-sigma step: {mean:.2}");
        assert!((mean / 10.4 - 1.0).abs() < 0.15, "mean delay {mean}");
        // One fixed case, message says what, since when, how much, what to do.
        let seed = 3;
        let v: Vec<f64> = noise(seed, 400)
            .iter()
            .enumerate()
            .map(|(i, e)| 0.05 * e + if i >= 200 { 0.1 } else { 0.0 })
            .collect();
        let t = m.run(&obs(&v));
        let a = t
            .episodes()
            .into_iter()
            .find(|a| a.index >= 200)
            .expect("flagged");
        assert!(
            a.since_index >= 185 && a.since_index <= 215,
            "seed {seed}: since {}",
            a.since_index
        );
        assert!(
            (a.shift - 0.1).abs() < 0.06,
            "seed {seed}: shift {}",
            a.shift
        );
        let msg = a.message();
        assert!(
            msg.contains("internal reference check")
                && msg.contains("since")
                && msg.contains("cell calibration"),
            "{msg}"
        );
        // An episode's size is the mean shift over the span it names: from
        // its change point to the last alarm folded into it (it was the
        // last alarm's own size, over that alarm's span, which may start
        // elsewhere or come from the other chart).
        let mut later: Vec<&Alarm> = t
            .alarms
            .iter()
            .filter(|x| x.direction == a.direction && x.index > a.index)
            .collect();
        later.sort_by_key(|x| x.index);
        let mut last = a.index;
        let mut folded = 0;
        for x in later {
            if x.since_index > last + 1 {
                break;
            }
            last = x.index;
            folded += 1;
        }
        assert!(folded >= 1, "the step raises more than one alarm");
        let span = &v[a.since_index..=last];
        let mean = span.iter().sum::<f64>() / span.len() as f64;
        assert!(
            (a.shift - (mean - m.target)).abs() < 1e-12,
            "episode size {} against the mean over {}..={last}: {}",
            a.shift,
            a.since_index,
            mean - m.target
        );
    }

    #[test]
    fn slow_ramp_in_reference_check_is_flagged() {
        // A ramp of 0.02 sigma per observation from observation 100: the
        // mean reaches 1 sigma after 50 observations. Stated bound: flagged
        // within 50 + ARL(1 sigma) = 60.4 observations of the ramp's start on
        // average (by the time the shift is 1 sigma the chart has already
        // accumulated), measured over 200 seeds.
        let m = Monitor::new(Quantity::ReferenceCheck, 1.0, 0.002);
        let mut total = 0.0;
        for seed in 0..200u64 {
            let v: Vec<f64> = noise(seed + 1000, 1000)
                .iter()
                .enumerate()
                .map(|(i, e)| 1.0 + 0.002 * (e + 0.02 * (i as f64 - 100.0).max(0.0)))
                .collect();
            let t = m.run(&obs(&v));
            let a = t
                .alarms
                .iter()
                .find(|a| a.index >= 100)
                .unwrap_or_else(|| panic!("seed {}: ramp not flagged", seed + 1000));
            total += (a.index + 1 - 100) as f64;
        }
        let mean = total / 200.0;
        eprintln!("mean delay after a 0.02 sigma/obs ramp: {mean:.1}");
        assert!(mean < 60.4, "mean delay {mean}");
    }

    #[test]
    fn lab_residual_bias_asks_for_bias_adjust() {
        let m = Monitor::new(Quantity::LabResidual, 0.0, 0.3);
        let seed = 11;
        let v: Vec<f64> = noise(seed, 40).iter().map(|e| 0.3 * e + 0.6).collect();
        let t = m.run(&obs(&v));
        let a = t
            .alarms
            .first()
            .unwrap_or_else(|| panic!("seed {seed}: no alarm"));
        assert_eq!(a.action, Action::BiasAdjust);
        assert!(a.message().contains("bias-adjust"));
    }

    #[test]
    fn window_build_up_asks_for_cleaning() {
        // Empty-line eps' creeping up by 0.002 per reading, noise 0.01.
        let m = Monitor::new(Quantity::EmptyBaseline, 1.05, 0.01);
        let seed = 5;
        let v: Vec<f64> = noise(seed, 300)
            .iter()
            .enumerate()
            .map(|(i, e)| 1.05 + 0.01 * e + 0.002 * i as f64)
            .collect();
        let t = m.run(&obs(&v));
        let a = t
            .alarms
            .first()
            .unwrap_or_else(|| panic!("seed {seed}: no alarm"));
        assert_eq!(
            (a.action, a.direction),
            (Action::CleanWindow, Direction::Up)
        );
        assert!(a.message().contains("clean the sensor window"));
    }

    #[test]
    fn temperature_beyond_range_is_flagged_and_inside_is_not() {
        let m = Monitor::temperature(10.0, 40.0, 0.5);
        let seed = 9;
        let inside: Vec<f64> = noise(seed, 5000).iter().map(|e| 25.0 + 0.5 * e).collect();
        assert!(m.run(&obs(&inside)).alarms.is_empty(), "seed {seed}");
        let hot: Vec<f64> = noise(seed, 100)
            .iter()
            .enumerate()
            .map(|(i, e)| if i < 50 { 38.0 } else { 42.0 } + 0.5 * e)
            .collect();
        let t = m.run(&obs(&hot));
        let a = t
            .alarms
            .first()
            .unwrap_or_else(|| panic!("seed {seed}: no alarm"));
        assert_eq!(
            (a.direction, a.action),
            (Direction::Up, Action::TemperatureRange)
        );
        assert!(
            a.index >= 50 && a.index < 60,
            "seed {seed}: index {}",
            a.index
        );
        assert!(
            (a.shift - 2.0).abs() < 0.6,
            "seed {seed}: shift {}",
            a.shift
        );
        assert!(
            a.message().contains("above the calibrated range"),
            "{}",
            a.message()
        );
    }

    #[test]
    fn moving_range_sigma_of_white_noise() {
        let seed = 21;
        let v: Vec<f64> = noise(seed, 20_000).iter().map(|e| 2.0 * e).collect();
        let s = sigma_moving_range(&v).expect("enough values");
        assert!((s / 2.0 - 1.0).abs() < 0.03, "seed {seed}: {s}");
        assert_eq!(sigma_moving_range(&[1.0]), None);
    }

    #[test]
    fn non_finite_values_are_skipped_and_bad_sigma_gives_nothing() {
        let m = Monitor::new(Quantity::ReferenceCheck, 0.0, 1.0);
        let t = m.run(&obs(&[0.0, f64::NAN, 0.1]));
        assert_eq!(t.obs.len(), 2);
        let bad = Monitor::new(Quantity::ReferenceCheck, 0.0, 0.0);
        assert!(bad.run(&obs(&[100.0; 10])).alarms.is_empty());
    }
}
