//! `saccade run` and `saccade check`.

use std::path::PathBuf;
use std::process::ExitCode;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;
use std::time::Duration;

use clap::Args;
use saccade::config::Config;
use saccade::engine::Bundle;
use saccade::source::{self, SourceConfig, SourceCounters};

#[derive(Args)]
pub struct ConfigArgs {
    /// The TOML configuration file.
    #[arg(long)]
    pub config: PathBuf,
}

/// Run until stopped: analyse frames from the configured source and write the detection log.
pub fn run(args: ConfigArgs) -> anyhow::Result<ExitCode> {
    saccade::service::daemon::run(&args.config)?;
    Ok(ExitCode::SUCCESS)
}

/// Validate the config, load the bundle, open the source once, print the effective config.
pub fn check(args: ConfigArgs) -> anyhow::Result<ExitCode> {
    let cfg = Config::load(&args.config)?;
    let bundle = Bundle::load(&cfg.bundle, &cfg.engine.settings.batch_sizes())?;
    cfg.check_bundle(&args.config, &bundle).map_err(anyhow::Error::msg)?;
    let stop = Arc::new(AtomicBool::new(false));
    let running = source::start(&cfg.source, cfg.max_pixels, Arc::new(SourceCounters::default()), stop.clone())
        .map_err(|e| anyhow::anyhow!("{}: {e}", args.config.display()))?;
    let opened = match &cfg.source {
        // A watched folder may rightly be empty; listing it was the check.
        SourceConfig::Folder { path, .. } => format!("folder {} is readable", path.display()),
        _ => match running.frames.recv_timeout(Duration::from_secs(30)) {
            Ok(Ok(f)) => format!("first frame {} ({}×{})", f.origin, f.width(), f.height()),
            Ok(Err(e)) => anyhow::bail!("{}: the source's first frame is bad: {}", args.config.display(), e.message),
            Err(_) => anyhow::bail!("{}: the source gave no frame within 30 s", args.config.display()),
        },
    };
    stop.store(true, Ordering::Relaxed);
    drop(running.frames);
    running.thread.join().ok();
    eprintln!(
        "config {} is valid; bundle {} loaded ({} classes); {opened}",
        args.config.display(),
        bundle.manifest.name,
        bundle.manifest.classes.len()
    );
    print!("{}", toml::to_string_pretty(&cfg)?);
    Ok(ExitCode::SUCCESS)
}
