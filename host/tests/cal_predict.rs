//! `fringe cal predict` (issue 11, item 7): the prediction in a column of
//! its own beside the lab value, the prediction interval, the leverage and
//! the flags, as CSV and with `--json`. Made-up tables (plumbing tests).

use std::process::Command;

const HEADER: &str =
    "sample_id,moisture_pct,temperature_c,freq1_hz,eps1_re,eps1_im,freq2_hz,eps2_re,eps2_im";

fn row(id: &str, m: f64, t: f64, lab: bool) -> String {
    let d = ((id.len() * 7 + (m * 10.0) as usize) % 5) as f64 * 0.01;
    format!(
        "{id},{},{t},1000000,{},{},20000000,{},0.3",
        if lab { format!("{m}") } else { String::new() },
        2.0 + 0.25 * m,
        0.5 + 0.02 * m,
        1.8 + 0.2 * m + d
    )
}

#[test]
fn predict_keeps_the_lab_value_and_adds_interval_leverage_and_flags() {
    let dir = tempfile::tempdir().expect("dir");
    let lab = dir.path().join("lab.csv");
    let rows: Vec<String> = (0..24)
        .map(|i| {
            row(
                &format!("S{i}"),
                10.0 + 0.5 * f64::from(i),
                18.0 + f64::from(i % 7),
                true,
            )
        })
        .collect();
    std::fs::write(&lab, format!("{HEADER}\n{}\n", rows.join("\n"))).expect("write");
    let cal = dir.path().join("p.toml");
    let o = Command::new(env!("CARGO_BIN_EXE_fringe"))
        .args(["cal", "fit", "--model", "single", "--samples"])
        .arg(&lab)
        .arg("--out")
        .arg(&cal)
        .output()
        .expect("run");
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let input = dir.path().join("in.csv");
    std::fs::write(
        &input,
        format!(
            "{HEADER}\n{}\n{}\n",
            row("N1", 15.0, 20.0, true),
            // Far outside the calibration (moisture and temperature), no lab value.
            row("FAR", 40.0, 60.0, false)
        ),
    )
    .expect("write");
    let out = dir.path().join("pred.csv");
    let o = Command::new(env!("CARGO_BIN_EXE_fringe"))
        .args(["cal", "predict", "--cal"])
        .arg(&cal)
        .arg("--input")
        .arg(&input)
        .arg("--out")
        .arg(&out)
        .output()
        .expect("run");
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let text = std::fs::read_to_string(&out).expect("csv");
    let mut lines = text.lines();
    assert_eq!(
        lines.next(),
        Some("sample_id,moisture_pct,predicted_moisture_pct,uncertainty_pct,interval_low_pct,interval_high_pct,leverage,flags,cal_id")
    );
    let n1: Vec<&str> = lines.next().expect("N1").split(',').collect();
    assert_eq!(n1[0], "N1");
    // Up to 3 decimals, trailing zeros dropped: the lab value's rule of
    // fringe_quality::numbers.
    assert_eq!(n1[1], "15", "lab value kept: {text}");
    let p: f64 = n1[2].parse().expect("predicted");
    let (lo, hi): (f64, f64) = (n1[4].parse().expect("lo"), n1[5].parse().expect("hi"));
    assert!(lo < p && p < hi && (p - 15.0).abs() < 1.0, "{text}");
    assert!(n1[6].parse::<f64>().expect("leverage") > 0.0, "{text}");
    let far: Vec<&str> = lines.next().expect("FAR").split(',').collect();
    assert_eq!(far[1], "", "no lab value: {text}");
    assert!(far[7].contains("out_of_range"), "{text}");
    assert!(far[7].contains("beyond_calibration"), "{text}");

    let o = Command::new(env!("CARGO_BIN_EXE_fringe"))
        .args(["cal", "predict", "--json", "--cal"])
        .arg(&cal)
        .arg("--input")
        .arg(&input)
        .output()
        .expect("run");
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let v: serde_json::Value = serde_json::from_slice(&o.stdout).expect("one JSON object");
    assert_eq!(v["rows"][0]["moisture_pct"], 15.0);
    assert!(v["rows"][0]["predicted_moisture_pct"].is_number());
    assert_eq!(
        v["rows"][0]["interval_pct"].as_array().map(Vec::len),
        Some(2)
    );
    assert!(v["rows"][1]["moisture_pct"].is_null());
    assert_eq!(v["confidence"], 0.95);

    // A table measured at other frequencies than the calibration's is an
    // input error (exit 3) that names the sample, and nothing is written.
    let other = dir.path().join("other.csv");
    std::fs::write(
        &other,
        format!(
            "{HEADER}\n{}\n",
            row("HF1", 15.0, 20.0, true).replace(",20000000,", ",30000000,")
        ),
    )
    .expect("write");
    let out2 = dir.path().join("pred2.csv");
    let o = Command::new(env!("CARGO_BIN_EXE_fringe"))
        .args(["cal", "predict", "--cal"])
        .arg(&cal)
        .arg("--input")
        .arg(&other)
        .arg("--out")
        .arg(&out2)
        .output()
        .expect("run");
    let e = String::from_utf8_lossy(&o.stderr);
    assert_eq!(o.status.code(), Some(3), "{e}");
    assert!(e.contains("HF1") && e.contains("30 MHz"), "{e}");
    assert!(!out2.exists());
}
