//! The least-squares solvers against the NIST Statistical Reference Datasets
//! (NIST/ITL StRD, linear and nonlinear regression; files in
//! `tests/data/nist-strd/`, certified values parsed from them).
//!
//! Accuracy is the log relative error LRE = -log10(|est - cert| / |cert|)
//! (McCullough, "Assessing the reliability of statistical software",
//! The American Statistician 52(4), 1998, the measure NIST's StRD pages
//! use). NIST's guidance: a good nonlinear solver reaches about 6 digits from
//! both starting points for most problems; linear problems of lower
//! difficulty reach the certified values to 9-10 digits or more in double
//! precision.
#![cfg(feature = "fit")]

use fringe_calibration::fit::{fit_curve, fit_linear, polynomial_design, LmOptions};

/// A parsed StRD file.
struct Strd {
    name: &'static str,
    /// Per parameter: start 1, start 2 (NaN for linear), certified value,
    /// certified standard deviation.
    params: Vec<[f64; 4]>,
    rss: Option<f64>,
    residual_sd: f64,
    r_squared: Option<f64>,
    /// (x, y) pairs.
    data: Vec<(f64, f64)>,
}

fn load(name: &'static str) -> Strd {
    let path = format!(
        "{}/tests/data/nist-strd/{name}.dat",
        env!("CARGO_MANIFEST_DIR")
    );
    let text = std::fs::read_to_string(&path).unwrap_or_else(|e| panic!("{path}: {e}"));
    let num = |s: &str| -> f64 {
        s.parse::<f64>()
            .unwrap_or_else(|e| panic!("{path}: bad number {s:?}: {e}"))
    };
    let mut params = Vec::new();
    let mut rss = None;
    let mut residual_sd = f64::NAN;
    let mut r_squared = None;
    let lines: Vec<&str> = text.lines().collect();
    // The data follow the last line that starts with "Data:".
    let data_start = lines
        .iter()
        .rposition(|l| l.starts_with("Data:"))
        .unwrap_or_else(|| panic!("{path}: no data header"));
    for (lineno, line) in lines[..data_start].iter().enumerate() {
        let t: Vec<&str> = line.split_whitespace().collect();
        let is_param = t.len() >= 2
            && (t[0].starts_with('b') || t[0].starts_with('B'))
            && t[0][1..].parse::<u32>().is_ok();
        if is_param && t[1] == "=" && t.len() == 6 {
            // nonlinear: "b1 = start1 start2 certified sd"
            params.push([num(t[2]), num(t[3]), num(t[4]), num(t[5])]);
        } else if is_param && t.len() == 3 {
            // linear: "B0 certified sd"
            params.push([f64::NAN, f64::NAN, num(t[1]), num(t[2])]);
        } else if line.contains("Residual Sum of Squares:") {
            rss = Some(num(t[t.len() - 1]));
        } else if line.contains("Residual Standard Deviation")
            || (line.trim_start().starts_with("Standard Deviation")
                && lines[lineno - 1].trim() == "Residual")
        {
            // nonlinear files: one line; linear files: "Residual" on the line before.
            residual_sd = num(t[t.len() - 1]);
        } else if line.contains("R-Squared") {
            r_squared = Some(num(t[t.len() - 1]));
        }
    }
    let mut data = Vec::new();
    for line in &lines[data_start + 1..] {
        let t: Vec<&str> = line.split_whitespace().collect();
        if t.len() == 2 {
            // StRD data columns are "y x".
            data.push((num(t[1]), num(t[0])));
        }
    }
    assert!(
        !params.is_empty() && !data.is_empty(),
        "{path}: nothing parsed"
    );
    assert!(residual_sd.is_finite(), "{path}: no residual SD");
    Strd {
        name,
        params,
        rss,
        residual_sd,
        r_squared,
        data,
    }
}

/// Log relative error (LRE), capped at 15 (double precision).
fn lre(est: f64, cert: f64) -> f64 {
    let rel = if cert == 0.0 {
        est.abs()
    } else {
        ((est - cert) / cert).abs()
    };
    if rel == 0.0 {
        15.0
    } else {
        (-rel.log10()).min(15.0)
    }
}

/// Norris (lower difficulty, linear): coefficients, their standard
/// deviations, residual SD and R^2 to at least 10 significant digits.
#[test]
fn norris_linear() {
    let s = load("Norris");
    assert_eq!(s.data.len(), 36, "Norris has 36 observations");
    let x: Vec<f64> = s.data.iter().map(|d| d.0).collect();
    let y: Vec<f64> = s.data.iter().map(|d| d.1).collect();
    let fit = fit_linear(&polynomial_design(&x, 1), &y, None).unwrap();
    let mut worst = f64::INFINITY;
    for (j, p) in s.params.iter().enumerate() {
        let a = lre(fit.coef[j], p[2]);
        let b = lre(fit.std_err[j], p[3]);
        println!("Norris B{j}: LRE estimate {a:.1}, standard deviation {b:.1}");
        worst = worst.min(a).min(b);
    }
    let sd = lre(fit.residual_sd, s.residual_sd);
    let r2 = lre(fit.r_squared, s.r_squared.unwrap());
    println!("Norris residual SD LRE {sd:.1}, R^2 LRE {r2:.1}");
    worst = worst.min(sd).min(r2);
    assert!(worst >= 10.0, "Norris: worst LRE {worst:.1} < 10");
}

/// Wampler1 (NIST StRD, linear, degree-5 polynomial): y = 1 + x + ... + x^5
/// at x = 0, 1, ..., 20, certified coefficients all exactly 1 and residual SD
/// 0. The data are generated here from that definition (from memory of the
/// StRD page; the file is not in the repo), so this is an ill-conditioned
/// check (x^5 reaches 3.2e6) of the column scaling and SVD.
#[test]
fn wampler1_polynomial_from_definition() {
    let x: Vec<f64> = (0..=20).map(f64::from).collect();
    let y: Vec<f64> = x.iter().map(|v| (0..6).map(|k| v.powi(k)).sum()).collect();
    let fit = fit_linear(&polynomial_design(&x, 5), &y, None).unwrap();
    for (j, b) in fit.coef.iter().enumerate() {
        let l = lre(*b, 1.0);
        println!("Wampler1 B{j} = {b:.15} LRE {l:.1}");
        assert!(l >= 9.0, "Wampler1 B{j}: LRE {l:.1}");
    }
    assert!(fit.residual_sd < 1e-7, "residual SD {}", fit.residual_sd);
}

type Model = fn(f64, &[f64]) -> f64;
type Gradient = fn(f64, &[f64], &mut [f64]);

fn misra1a(x: f64, b: &[f64]) -> f64 {
    b[0] * (1.0 - (-b[1] * x).exp())
}
fn misra1a_grad(x: f64, b: &[f64], g: &mut [f64]) {
    let e = (-b[1] * x).exp();
    g[0] = 1.0 - e;
    g[1] = b[0] * x * e;
}
fn chwirut2(x: f64, b: &[f64]) -> f64 {
    (-b[0] * x).exp() / (b[1] + b[2] * x)
}
fn chwirut2_grad(x: f64, b: &[f64], g: &mut [f64]) {
    let e = (-b[0] * x).exp();
    let d = b[1] + b[2] * x;
    g[0] = -x * e / d;
    g[1] = -e / (d * d);
    g[2] = -x * e / (d * d);
}
fn lanczos3(x: f64, b: &[f64]) -> f64 {
    b[0] * (-b[1] * x).exp() + b[2] * (-b[3] * x).exp() + b[4] * (-b[5] * x).exp()
}
fn lanczos3_grad(x: f64, b: &[f64], g: &mut [f64]) {
    for k in 0..3 {
        let e = (-b[2 * k + 1] * x).exp();
        g[2 * k] = e;
        g[2 * k + 1] = -b[2 * k] * x * e;
    }
}
fn thurber(x: f64, b: &[f64]) -> f64 {
    let (x2, x3) = (x * x, x * x * x);
    (b[0] + b[1] * x + b[2] * x2 + b[3] * x3) / (1.0 + b[4] * x + b[5] * x2 + b[6] * x3)
}
fn thurber_grad(x: f64, b: &[f64], g: &mut [f64]) {
    let (x2, x3) = (x * x, x * x * x);
    let num = b[0] + b[1] * x + b[2] * x2 + b[3] * x3;
    let den = 1.0 + b[4] * x + b[5] * x2 + b[6] * x3;
    let pw = [1.0, x, x2, x3];
    for k in 0..4 {
        g[k] = pw[k] / den;
    }
    for k in 0..3 {
        g[4 + k] = -num * pw[k + 1] / (den * den);
    }
}
fn mgh09(x: f64, b: &[f64]) -> f64 {
    b[0] * (x * x + x * b[1]) / (x * x + x * b[2] + b[3])
}
fn mgh09_grad(x: f64, b: &[f64], g: &mut [f64]) {
    let num = x * x + x * b[1];
    let den = x * x + x * b[2] + b[3];
    g[0] = num / den;
    g[1] = b[0] * x / den;
    g[2] = -b[0] * num * x / (den * den);
    g[3] = -b[0] * num / (den * den);
}
fn eckerle4(x: f64, b: &[f64]) -> f64 {
    let z = (x - b[2]) / b[1];
    b[0] / b[1] * (-0.5 * z * z).exp()
}
fn eckerle4_grad(x: f64, b: &[f64], g: &mut [f64]) {
    let z = (x - b[2]) / b[1];
    let e = (-0.5 * z * z).exp();
    g[0] = e / b[1];
    g[1] = b[0] * e * (z * z - 1.0) / (b[1] * b[1]);
    g[2] = b[0] / b[1] * e * z / b[1];
}
fn rat43(x: f64, b: &[f64]) -> f64 {
    b[0] / (1.0 + (b[1] - b[2] * x).exp()).powf(1.0 / b[3])
}
fn rat43_grad(x: f64, b: &[f64], g: &mut [f64]) {
    let e = (b[1] - b[2] * x).exp();
    let u = 1.0 + e;
    let f = b[0] / u.powf(1.0 / b[3]);
    g[0] = f / b[0];
    g[1] = -f * e / (b[3] * u);
    g[2] = f * e * x / (b[3] * u);
    g[3] = f * u.ln() / (b[3] * b[3]);
}

/// Fit one StRD problem from one start; returns the worst LRE over the
/// parameters, their standard deviations (reported separately) and the RSS.
fn run(s: &Strd, start: usize, f: Model, g: Gradient, opts: &LmOptions) -> Option<(f64, f64)> {
    let x: Vec<f64> = s.data.iter().map(|d| d.0).collect();
    let y: Vec<f64> = s.data.iter().map(|d| d.1).collect();
    let p0: Vec<f64> = s.params.iter().map(|p| p[start - 1]).collect();
    let fit = match fit_curve(&x, &y, None, f, Some(g), &p0, opts) {
        Ok(fit) => fit,
        Err(e) => {
            println!("{} start {start}: {e}", s.name);
            return None;
        }
    };
    let est = s
        .params
        .iter()
        .zip(&fit.params)
        .map(|(p, b)| lre(*b, p[2]))
        .fold(f64::INFINITY, f64::min);
    let sd = s
        .params
        .iter()
        .zip(&fit.std_err)
        .map(|(p, b)| lre(*b, p[3]))
        .fold(f64::INFINITY, f64::min);
    let rss = lre(fit.rss, s.rss.unwrap());
    let rsd = lre(fit.residual_sd, s.residual_sd);
    println!(
        "{} start {start}: LRE params {est:.1}, std dev {sd:.1}, RSS {rss:.1}, residual SD {rsd:.1}; {} steps, {:?}",
        s.name, fit.iterations, fit.termination
    );
    Some((est.min(rss).min(rsd), sd))
}

/// Assert 6 digits on parameters, RSS and residual SD, and 4 on the
/// standard deviations (the certified SDs come from the same linearisation
/// at the solution; 4 digits is what they are used for).
fn check(name: &'static str, f: Model, g: Gradient, starts: &[usize]) {
    check_with(name, f, g, starts, &LmOptions::default());
}

fn check_with(name: &'static str, f: Model, g: Gradient, starts: &[usize], opts: &LmOptions) {
    let s = load(name);
    for &start in starts {
        let (est, sd) = run(&s, start, f, g, opts)
            .unwrap_or_else(|| panic!("{name} start {start}: the fit failed"));
        assert!(est >= 6.0, "{name} start {start}: LRE {est:.1} < 6");
        assert!(sd >= 4.0, "{name} start {start}: SD LRE {sd:.1} < 4");
    }
}

/// Misra1a (lower difficulty), both NIST starts.
#[test]
fn misra1a_both_starts() {
    check("Misra1a", misra1a, misra1a_grad, &[1, 2]);
}

/// Misra1a again with the Jacobian by central differences (no analytic
/// gradient), both starts: 6 digits still.
#[test]
fn misra1a_finite_difference_jacobian() {
    let s = load("Misra1a");
    let x: Vec<f64> = s.data.iter().map(|d| d.0).collect();
    let y: Vec<f64> = s.data.iter().map(|d| d.1).collect();
    for start in 0..2 {
        let p0: Vec<f64> = s.params.iter().map(|p| p[start]).collect();
        let fit = fit_curve(
            &x,
            &y,
            None,
            misra1a,
            None::<Gradient>,
            &p0,
            &LmOptions::default(),
        )
        .unwrap();
        for (p, b) in s.params.iter().zip(&fit.params) {
            let l = lre(*b, p[2]);
            assert!(l >= 6.0, "Misra1a start {}: LRE {l:.1}", start + 1);
        }
    }
}

/// Chwirut2 (lower difficulty), both NIST starts.
#[test]
fn chwirut2_both_starts() {
    check("Chwirut2", chwirut2, chwirut2_grad, &[1, 2]);
}

/// Lanczos3 (lower difficulty per its file; six exponential parameters,
/// badly conditioned), both NIST starts.
#[test]
fn lanczos3_both_starts() {
    check("Lanczos3", lanczos3, lanczos3_grad, &[1, 2]);
}

/// Thurber (higher difficulty, rational cubic/cubic), both NIST starts.
#[test]
fn thurber_both_starts() {
    check("Thurber", thurber, thurber_grad, &[1, 2]);
}

/// MGH09 (higher difficulty, Kowalik-Osborne), both NIST starts.
#[test]
fn mgh09_both_starts() {
    check("MGH09", mgh09, mgh09_grad, &[1, 2]);
}

/// Eckerle4 (higher difficulty, Gaussian peak), both NIST starts.
#[test]
fn eckerle4_both_starts() {
    check("Eckerle4", eckerle4, eckerle4_grad, &[1, 2]);
}

/// BoxBOD (higher difficulty, 6 observations). Start 2 with the default
/// options. Start 1 (b1 = 1, b2 = 1) with the default initial damping
/// (1e-3, nearly a Gauss-Newton first step) jumps to b2 > 30 where
/// 1 - exp(-b2 x) is 1 at every x: the model is then the constant b1 = 172.5
/// (RSS 9771.5), a plateau rather than the certified minimum. Starting with
/// heavy damping (initial_damping = 100, short gradient-like first steps)
/// reaches the certified values, so start 1 is tested with that option.
#[test]
fn boxbod_both_starts() {
    check("BoxBOD", misra1a, misra1a_grad, &[2]);
    let damped = LmOptions {
        initial_damping: 100.0,
        ..LmOptions::default()
    };
    check_with("BoxBOD", misra1a, misra1a_grad, &[1], &damped);
}

/// Rat43 (higher difficulty, Richards growth curve), both NIST starts.
#[test]
fn rat43_both_starts() {
    check("Rat43", rat43, rat43_grad, &[1, 2]);
}

/// Longley (NIST StRD linear regression, higher difficulty: six nearly
/// collinear regressors; Longley, "An appraisal of least squares programs
/// for the electronic computer from the viewpoint of the user", JASA 62,
/// 819-841, 1967). The file is not among the StRD copies in
/// `tests/data/nist-strd/`; the 16 observations and the certified values
/// below are transcribed from public copies of NIST's `Longley.dat` (several
/// independent ones agree). A single wrong datum would move the fit far from
/// the certified values, so reaching them checks the transcription too.
#[test]
fn longley_linear_ill_conditioned() {
    // y, x1 .. x6
    const DATA: [[f64; 7]; 16] = [
        [60323.0, 83.0, 234289.0, 2356.0, 1590.0, 107608.0, 1947.0],
        [61122.0, 88.5, 259426.0, 2325.0, 1456.0, 108632.0, 1948.0],
        [60171.0, 88.2, 258054.0, 3682.0, 1616.0, 109773.0, 1949.0],
        [61187.0, 89.5, 284599.0, 3351.0, 1650.0, 110929.0, 1950.0],
        [63221.0, 96.2, 328975.0, 2099.0, 3099.0, 112075.0, 1951.0],
        [63639.0, 98.1, 346999.0, 1932.0, 3594.0, 113270.0, 1952.0],
        [64989.0, 99.0, 365385.0, 1870.0, 3547.0, 115094.0, 1953.0],
        [63761.0, 100.0, 363112.0, 3578.0, 3350.0, 116219.0, 1954.0],
        [66019.0, 101.2, 397469.0, 2904.0, 3048.0, 117388.0, 1955.0],
        [67857.0, 104.6, 419180.0, 2822.0, 2857.0, 118734.0, 1956.0],
        [68169.0, 108.4, 442769.0, 2936.0, 2798.0, 120445.0, 1957.0],
        [66513.0, 110.8, 444546.0, 4681.0, 2637.0, 121950.0, 1958.0],
        [68655.0, 112.6, 482704.0, 3813.0, 2552.0, 123366.0, 1959.0],
        [69564.0, 114.2, 502601.0, 3931.0, 2514.0, 125368.0, 1960.0],
        [69331.0, 115.7, 518173.0, 4806.0, 2572.0, 127852.0, 1961.0],
        [70551.0, 116.9, 554894.0, 4007.0, 2827.0, 130081.0, 1962.0],
    ];
    // Certified estimate and standard deviation of B0 .. B6.
    const CERT: [[f64; 2]; 7] = [
        [-3482258.63459582, 890420.383607373],
        [15.0618722713733, 84.9149257747669],
        [-0.358191792925910e-01, 0.334910077722432e-01],
        [-2.02022980381683, 0.488399681651699],
        [-1.03322686717359, 0.214274163161675],
        [-0.511041056535807e-01, 0.226073200069370],
        [1829.15146461355, 455.478499142212],
    ];
    let design = nalgebra::DMatrix::from_fn(16, 7, |i, j| if j == 0 { 1.0 } else { DATA[i][j] });
    let y: Vec<f64> = DATA.iter().map(|r| r[0]).collect();
    let fit = fit_linear(&design, &y, None).unwrap();
    let mut worst = f64::INFINITY;
    for (j, c) in CERT.iter().enumerate() {
        let (a, b) = (lre(fit.coef[j], c[0]), lre(fit.std_err[j], c[1]));
        println!("Longley B{j}: LRE estimate {a:.1}, standard deviation {b:.1}");
        worst = worst.min(a).min(b);
    }
    let sd = lre(fit.residual_sd, 304.854073561965);
    let r2 = lre(fit.r_squared, 0.995479004577296);
    println!(
        "Longley residual SD LRE {sd:.1}, R^2 LRE {r2:.1}, condition {:.3e}",
        fit.condition
    );
    worst = worst.min(sd).min(r2);
    assert!(worst >= 10.0, "Longley: worst LRE {worst:.1} < 10");
}
