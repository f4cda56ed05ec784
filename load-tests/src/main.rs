//! `switchyard-load`: glue. Parses the command line, runs the command from the library, prints
//! the summary table and writes the report.

use clap::Parser;
use switchyard_load::cli::{Cli, Command, fairness, overhead, run, serving, soak};

fn main() {
    let cli = Cli::parse();
    let command_line = std::env::args().collect::<Vec<_>>().join(" ");
    if let Command::Soak(args) = &cli.command {
        let passed = soak(args, &command_line).and_then(|report| {
            print!("{}", report.text);
            for p in report.write(&args.out)? {
                eprintln!("wrote {}", p.display());
            }
            Ok(report.passed)
        });
        match passed {
            Ok(true) => return,
            Ok(false) => {
                eprintln!("switchyard-load: a soak verdict failed (see the report)");
                std::process::exit(1);
            }
            Err(e) => {
                eprintln!("switchyard-load: {e:#}");
                std::process::exit(1);
            }
        }
    }
    if let Command::Serving(args) = &cli.command {
        let written = serving(args, &command_line).and_then(|report| {
            print!("{}", report.text);
            report.write(&args.out)
        });
        match written {
            Ok(paths) => {
                for p in paths {
                    eprintln!("wrote {}", p.display());
                }
                return;
            }
            Err(e) => {
                eprintln!("switchyard-load: {e:#}");
                std::process::exit(1);
            }
        }
    }
    let (result, out) = match &cli.command {
        Command::Soak(_) | Command::Serving(_) => unreachable!("handled above"),
        Command::Run(args) => (run(args, &command_line), args.out.clone()),
        Command::Overhead(args) => (overhead(args, &command_line), args.out.clone()),
        Command::Fairness(args) => (fairness(args, &command_line), args.out.clone()),
    };
    let written = result.and_then(|report| {
        print!("{}", report.table_text());
        report.write(&out)
    });
    match written {
        Ok(paths) => {
            for p in paths {
                eprintln!("wrote {}", p.display());
            }
        }
        Err(e) => {
            eprintln!("switchyard-load: {e:#}");
            std::process::exit(1);
        }
    }
}
