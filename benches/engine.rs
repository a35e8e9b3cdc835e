//! Simulation speed of the reference chain (see reference-chain.toml), in time per analog grid step.
//! Run: cargo bench --bench engine

use std::path::Path;

use criterion::{Criterion, criterion_group, criterion_main};

fn reference(duration: &str) -> convchain::scenario::Scenario {
    let text = include_str!("reference-chain.toml")
        .replace("duration = \"1 s\"", &format!("duration = \"{duration}\""));
    convchain::scenario::parse_str(&text, "reference-chain.toml", Path::new("."))
        .expect("reference scenario parses")
}

fn bench(c: &mut Criterion) {
    // 1 s of signal = 1e7 grid steps per iteration: divide the reported time by 1e7 for ns per step.
    let sc = reference("1 s");
    let mut g = c.benchmark_group("reference_chain");
    g.sample_size(10);
    g.bench_function("simulate_1s_1e7_steps", |b| {
        b.iter(|| convchain::engine::pipeline::run(&sc, None, &mut |_| {}).expect("runs"))
    });
    g.finish();
}

// Without criterion's plots: its plot backend needs system fonts, which a bare build machine lacks.
criterion_group! {
    name = benches;
    config = Criterion::default().without_plots();
    targets = bench
}
criterion_main!(benches);
