use std::process::ExitCode;

use clap::{Parser, Subcommand};

mod cli;

/// Attention sampling over high-resolution camera frames on small CPUs.
#[derive(Parser)]
#[command(name = "saccade", version, about)]
struct Args {
    #[command(subcommand)]
    command: Command,
}

#[derive(Subcommand)]
enum Command {
    Analyze(cli::analyze::AnalyzeArgs),
    Demo(cli::demo::DemoArgs),
    Bench(cli::bench::BenchArgs),
}

fn main() -> ExitCode {
    env_logger::Builder::from_env(env_logger::Env::default().default_filter_or("info")).init();
    let args = Args::parse();
    let result = match args.command {
        Command::Analyze(a) => cli::analyze::run(a),
        Command::Demo(a) => cli::demo::run(a),
        Command::Bench(a) => cli::bench::run(a),
    };
    match result {
        Ok(code) => code,
        Err(e) => {
            eprintln!("saccade: {e:#}");
            ExitCode::from(2)
        }
    }
}
