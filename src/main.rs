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
    Sweep(cli::sweep::SweepArgs),
    Probe(cli::probe::ProbeArgs),
    Scene(cli::scene::SceneArgs),
    #[cfg(feature = "train")]
    Train(cli::train::TrainArgs),
    Run(cli::run::ConfigArgs),
    Check(cli::run::ConfigArgs),
}

/// Human-readable logs on stderr with RUST_LOG levels. Under a service manager (stderr not
/// a terminal) lines are plain, without colour or timestamp, and carry the syslog
/// priority prefix `<N>` that journald reads (sd-daemon(3)).
fn init_logging() {
    use std::io::{IsTerminal, Write};
    let mut b = env_logger::Builder::from_env(env_logger::Env::default().default_filter_or("info"));
    if !std::io::stderr().is_terminal() {
        b.write_style(env_logger::WriteStyle::Never);
        let journal = std::env::var_os("JOURNAL_STREAM").is_some();
        b.format(move |f, r| {
            let prio = match r.level() {
                log::Level::Error => 3,
                log::Level::Warn => 4,
                log::Level::Info => 6,
                _ => 7,
            };
            if journal {
                writeln!(f, "<{prio}>{}", r.args())
            } else {
                writeln!(f, "{} {}: {}", r.level(), r.target(), r.args())
            }
        });
    }
    b.init();
}

fn main() -> ExitCode {
    init_logging();
    let args = Args::parse();
    let result = match args.command {
        Command::Analyze(a) => cli::analyze::run(a),
        Command::Demo(a) => cli::demo::run(a),
        Command::Bench(a) => cli::bench::run(a),
        Command::Sweep(a) => cli::sweep::run(a),
        Command::Probe(a) => cli::probe::run(a),
        Command::Scene(a) => cli::scene::run(a),
        #[cfg(feature = "train")]
        Command::Train(a) => cli::train::run(a),
        Command::Run(a) => cli::run::run(a),
        Command::Check(a) => cli::run::check(a),
    };
    match result {
        Ok(code) => code,
        Err(e) => {
            eprintln!("saccade: {e:#}");
            ExitCode::from(2)
        }
    }
}
