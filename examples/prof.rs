use std::time::Instant;
use convchain::engine::Timebase;
fn main() {
    let text = std::fs::read_to_string("benches/reference-chain.toml").unwrap().replace("duration = \"1 s\"", "duration = \"100 ms\"");
    let sc = convchain::scenario::parse_str(&text, "r", std::path::Path::new(".")).unwrap();
    let tb = Timebase::new(10e6);
    let n = 1_000_000usize;
    let mut chain = convchain::engine::pipeline::Chain::build(&sc, tb).unwrap();
    let mut buf = vec![0.0; 4096]; let mut out = vec![0.0; 4096];
    let t = Instant::now();
    for b in 0..(n/4096) { chain.source.fill((b*4096) as u64, &mut buf); }
    println!("source fill {:.1} ns/step", t.elapsed().as_nanos() as f64 / n as f64);
    let t = Instant::now();
    for _ in 0..(n/4096) { chain.post[0].1.process(&buf, &mut out); }
    println!("filter {:.1} ns/step", t.elapsed().as_nanos() as f64 / n as f64);
    let mut d = convchain::engine::decimate::Decimator::new(25); let mut v = Vec::new();
    let t = Instant::now();
    for _ in 0..(n/4096) { d.push(&buf, &mut v); }
    println!("decimator {:.1} ns/step", t.elapsed().as_nanos() as f64 / n as f64);
    let conv = chain.converter.as_mut().unwrap();
    let evs: Vec<convchain::engine::CodeEvent> = (0..100_000u64).map(|k| convchain::engine::CodeEvent{t_sample_s: k as f64/1e5, t_avail_s: k as f64/1e5 + 8e-6, code: (k % 4096) as u32}).collect();
    let t = Instant::now(); let mut i = 0;
    for b in 0..(n/4096) { i += conv.dac.render(tb, (b*4096) as u64, &evs[i..], &mut out); }
    println!("dac {:.1} ns/step", t.elapsed().as_nanos() as f64 / n as f64);
    let probe = convchain::engine::probe::ExactProbe { source: &chain.source };
    let conv = chain.converter.as_mut().unwrap();
    let t = Instant::now();
    for k in 0..100_000u64 { let _ = conv.adc.convert(k, &probe, &mut conv.sh); }
    println!("adc {:.1} ns/step (100k conversions)", t.elapsed().as_nanos() as f64 / n as f64);
    let t = Instant::now();
    let _ = convchain::engine::pipeline::run(&sc, None, &mut |_| {}).unwrap();
    println!("whole run {:.1} ns/step", t.elapsed().as_nanos() as f64 / n as f64);
}
#[allow(dead_code)]
fn unused() {}
