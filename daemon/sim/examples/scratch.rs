#![allow(missing_docs, clippy::unwrap_used)]
fn main() {
    for f in ["quiet-hour", "one-burst", "stress-20khz", "demo"] {
        let t0 = std::time::Instant::now();
        let s = glint_sim::load_scenario(std::path::Path::new(&format!("deploy/scenarios/{f}.toml"))).unwrap();
        let mut sim = glint_sim::Simulator::new(&s, s.seed).unwrap();
        let mut bytes = 0usize;
        for fr in sim.by_ref() { bytes += prost::Message::encoded_len(&fr); }
        println!("{f}: {:?} bytes {bytes} in {:.2?}", sim.stats(), t0.elapsed());
        for r in sim.truth() { println!("  {}", serde_json::to_string(&r).unwrap()); }
    }
}
