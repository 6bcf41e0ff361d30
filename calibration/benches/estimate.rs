//! One full f32 estimate: cell admittances -> permittivity -> two-frequency
//! inversion -> moisture with uncertainty, on a synthetic grain reading.
use criterion::{criterion_group, criterion_main, Criterion};
use fringe_calibration::cell::{permittivity_to_admittance, CellConstants};
use fringe_calibration::estimate::estimate_from_admittance;
use fringe_calibration::mixing::ProductMixture;
use fringe_calibration::moisture::Basis;
use fringe_calibration::product::{
    ModelKind, ProductCalibration, ProductModel, Range, RelaxationModel,
};
use fringe_calibration::synth::{SynthProduct, SynthSample};
use std::hint::black_box;

fn bench(c: &mut Criterion) {
    let product = SynthProduct::<f32>::grain();
    let model = ProductModel::Relaxation(RelaxationModel {
        law: product.law(),
        mixture: ProductMixture { ..product.mixture },
        t_ref_c: 25.0,
        coeffs: [0.0, 1.0, 0.0, 0.0],
        c_t: 0.0,
        c_sigma: 0.0,
        c_static: [0.0; 2],
        static_hold: fringe_calibration::product::no_static_hold(),
        sigma_hold: fringe_calibration::product::no_sigma_hold(),
        density_input: false,
    });
    let (p, n) = model.to_params();
    let r = Range::new;
    let cal = ProductCalibration::<f32>::from_parts(
        ModelKind::Relaxation,
        &p[..n],
        Basis::Wet,
        r(0.0, 40.0),
        r(-10.0, 60.0),
        &[r(1.0, 60.0), r(0.0, 1e3), r(1e-7, 10.0), r(0.0, 50.0)],
        0.3,
    )
    .expect("valid calibration");
    let freqs = [1.0e6f32, 20.0e6];
    let cells = [CellConstants {
        stray_pf: 2.7f32,
        cell_pf: 3.44,
        g_offset_s: 1e-7,
    }; 2];
    let s = SynthSample {
        moisture_pct: 15.0f32,
        temperature_c: 22.0,
        water_sigma25_s_m: 0.08,
    };
    let y = freqs.map(|f| {
        permittivity_to_admittance(f, product.permittivity(f, &s), &cells[0]).expect("cell")
    });
    let y_sd = [2e-9f32, 2e-8];
    c.bench_function("estimate_f32_cell_invert_moisture", |b| {
        b.iter(|| {
            estimate_from_admittance(
                black_box(freqs),
                black_box(y),
                y_sd,
                &cells,
                black_box(22.0f32),
                None,
                Some(&cal),
            )
        })
    });
}

criterion_group!(benches, bench);
criterion_main!(benches);
