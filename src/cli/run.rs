//! `saccade run` and `saccade check`.

use std::collections::HashSet;
use std::path::PathBuf;
use std::process::ExitCode;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;
use std::time::Duration;

use clap::Args;
use saccade::config::Config;
use saccade::service::daemon::build_engine;
use saccade::source::{self, SourceConfig, SourceCounters};

#[derive(Args)]
pub struct ConfigArgs {
    /// The TOML configuration file (config/saccade.toml lists every key).
    #[arg(long)]
    pub config: PathBuf,
}

/// Run until stopped: analyse frames from the configured source and write the detection log.
pub fn run(args: ConfigArgs) -> anyhow::Result<ExitCode> {
    saccade::service::daemon::run(&args.config)?;
    Ok(ExitCode::SUCCESS)
}

/// Validate the config, load the bundle, open the source once, print the effective config.
/// Nothing is written to disk: folders that `run` would create are only named.
pub fn check(args: ConfigArgs) -> anyhow::Result<ExitCode> {
    let cfg = Config::load(&args.config)?;
    let engine = build_engine(&cfg)?;
    let bundle = engine.bundle();
    let opened = match &cfg.source {
        // A watched folder may rightly be empty; listing it is the check. Its thread is not
        // started: it would take (move or delete) the files it finds.
        SourceConfig::Folder { path, .. } => {
            std::fs::read_dir(path)
                .map_err(|e| anyhow::anyhow!("{}: [source] path {}: {e}", args.config.display(), path.display()))?;
            format!("folder {} is readable", path.display())
        }
        _ => first_frame(&cfg, &args)?,
    };
    eprintln!(
        "config {} is valid; bundle {} loaded ({} classes); {opened}",
        args.config.display(),
        bundle.manifest.name,
        bundle.manifest.classes.len()
    );
    let missing: Vec<String> =
        cfg.folders().into_iter().filter(|d| !d.is_dir()).map(|d| d.display().to_string()).collect();
    if !missing.is_empty() {
        eprintln!("run will create {}", missing.join(", "));
    }
    print!("{}", toml::to_string_pretty(&cfg)?);
    Ok(ExitCode::SUCCESS)
}

/// Starts the source, waits for its first frame and stops it.
fn first_frame(cfg: &Config, args: &ConfigArgs) -> anyhow::Result<String> {
    let stop = Arc::new(AtomicBool::new(false));
    let counters = Arc::new(SourceCounters::default());
    let running = source::start(&cfg.source, cfg.max_pixels, counters, stop.clone(), &HashSet::new())
        .map_err(|e| anyhow::anyhow!("{}: {e}", args.config.display()))?;
    let first = running.frames.recv_timeout(Duration::from_secs(30));
    stop.store(true, Ordering::Relaxed);
    drop(running.frames);
    running.thread.join().ok();
    match first.map(|incoming| incoming.item) {
        Ok(Ok(f)) => Ok(format!("first frame {} ({}×{})", f.origin, f.width(), f.height())),
        Ok(Err(e)) => anyhow::bail!("{}: the source's first frame is bad: {}", args.config.display(), e.message),
        Err(_) => anyhow::bail!("{}: the source gave no frame within 30 s", args.config.display()),
    }
}
