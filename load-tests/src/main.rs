//! `switchyard-load`: prints a replayable request schedule for now; the HTTP driver and the
//! swap-overhead report come with the server.

use switchyard_load::workload::{Zipf, poisson_arrivals};

fn main() {
    let args: Vec<String> = std::env::args().skip(1).collect();
    let get = |flag: &str, default: f64| -> f64 {
        args.iter()
            .position(|a| a == flag)
            .and_then(|i| args.get(i + 1))
            .map(|v| {
                v.parse().unwrap_or_else(|_| {
                    eprintln!("switchyard-load: {flag} expects a number, got {v:?}");
                    std::process::exit(2)
                })
            })
            .unwrap_or(default)
    };
    if args.iter().any(|a| a == "--help" || a == "-h") {
        println!(
            "switchyard-load: print a request schedule (send time, adapter index)\n\n\
             --rate R       arrivals per second (default 50)\n\
             --duration S   seconds (default 2)\n\
             --adapters N   distinct adapters (default 10)\n\
             --zipf S       popularity exponent (default 1.0)\n\
             --seed N       random seed (default 1)"
        );
        return;
    }
    let zipf = match Zipf::new(get("--adapters", 10.0) as usize, get("--zipf", 1.0)) {
        Ok(z) => z,
        Err(e) => {
            eprintln!("switchyard-load: {e}");
            std::process::exit(2)
        }
    };
    let seed = get("--seed", 1.0) as u64;
    let mut rng = <rand_chacha::ChaCha8Rng as rand::SeedableRng>::seed_from_u64(seed ^ 0x5eed);
    for t in poisson_arrivals(
        get("--rate", 50.0),
        get("--duration", 2.0),
        usize::MAX,
        seed,
    ) {
        println!("{t:.6}\t{}", zipf.sample(&mut rng));
    }
}
