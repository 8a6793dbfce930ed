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
    /// Analyse image files once and print one JSON report per image.
    Analyze(cli::analyze::AnalyzeArgs),
    /// Write the demo bundle and generated frames, then analyse them (no camera needed).
    Demo(cli::demo::DemoArgs),
    /// Measure the cost of each stage of the engine on this machine.
    Bench(cli::bench::BenchArgs),
    /// Analyse labelled frames at several budgets and recommend the smallest good one.
    Sweep(cli::sweep::SweepArgs),
    /// Fit the bundle's probability maps and outcome thresholds to labelled frames.
    Calibrate(cli::calibrate::CalibrateArgs),
    /// Test the feature network alone at labelled mark positions (a linear probe).
    Probe(cli::probe::ProbeArgs),
    /// Write generated frames of the demo scenario and their labels.
    Scene(cli::scene::SceneArgs),
    /// Train a bundle on the CPU from frames with frame-level labels.
    #[cfg(feature = "train")]
    Train(cli::train::TrainArgs),
    /// Run the daemon: analyse frames from the configured source until stopped.
    Run(cli::run::ConfigArgs),
    /// Check a config file, load its bundle, open its source once, print the effective config.
    Check(cli::run::ConfigArgs),
}

/// Commands that print to standard output end quietly when the reader goes away (`saccade
/// demo | head`), as other Unix tools do: SIGPIPE ends the process. The daemon keeps the
/// Rust default (the signal ignored, the write failing) so that a closed stderr cannot
/// kill it.
fn quiet_on_closed_pipe() {
    // SAFETY: called first thing in main, before any other thread exists; restoring a
    // signal's default disposition has no other effect on this process.
    unsafe {
        libc::signal(libc::SIGPIPE, libc::SIG_DFL);
    }
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
    let args = Args::parse();
    if !matches!(args.command, Command::Run(_)) {
        quiet_on_closed_pipe();
    }
    init_logging();
    let result = match args.command {
        Command::Analyze(a) => cli::analyze::run(a),
        Command::Demo(a) => cli::demo::run(a),
        Command::Bench(a) => cli::bench::run(a),
        Command::Sweep(a) => cli::sweep::run(a),
        Command::Calibrate(a) => cli::calibrate::run(a),
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
