//! Fit benchmarks (filled in with the product-model fit).
use criterion::{criterion_group, criterion_main, Criterion};

fn bench(_c: &mut Criterion) {}

criterion_group!(benches, bench);
criterion_main!(benches);
