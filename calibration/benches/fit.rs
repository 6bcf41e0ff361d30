//! `cargo bench -p fringe-calibration --bench fit`: the relaxation-model fit
//! with leave-one-out cross-validation on 200 synthetic reference samples
//! (goal in issue 3: under 50 ms on this machine's host build), and the
//! single-frequency fit on the same samples for comparison.
use criterion::{criterion_group, criterion_main, Criterion};
use fringe_calibration::fit::{
    fit_relaxation, fit_single, synthetic_samples, RelaxationOptions, SingleOptions, SynthSpec,
};
use fringe_calibration::synth::SynthProduct;
use std::hint::black_box;

fn bench(c: &mut Criterion) {
    let product = SynthProduct::<f64>::grain();
    let spec = SynthSpec {
        n: 200,
        ..SynthSpec::default()
    };
    let samples = synthetic_samples(&product, &spec, 1);
    let opts = RelaxationOptions::new(
        product.mixture.bulk_density_kg_m3,
        product.mixture.particle_density_kg_m3,
    );
    let mut g = c.benchmark_group("fit");
    g.sample_size(20);
    g.bench_function("relaxation_loo_200", |b| {
        b.iter(|| fit_relaxation(black_box(&samples), &opts).expect("fit"))
    });
    g.bench_function("single_loo_200", |b| {
        b.iter(|| fit_single(black_box(&samples), &SingleOptions::default()).expect("fit"))
    });
    g.finish();
}

criterion_group!(benches, bench);
criterion_main!(benches);
