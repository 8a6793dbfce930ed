//! `saccade run`: source thread → bounded feed → analysis (this thread) → bounded channel
//! → sinks thread, until SIGTERM or SIGINT (or the end of a finite source). SIGHUP reloads
//! the config: a bad new config is rejected, logged, and the running one kept.

use std::collections::HashSet;
use std::path::Path;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;
use std::time::{Duration, Instant};

use crossbeam_channel::RecvTimeoutError;

use super::notify::Notifier;
use crate::config::Config;
use crate::engine::{Bundle, Engine};
use crate::folders;
use crate::sinks::jsonl::{claims_in, JsonlLog};
use crate::sinks::worker::{self, not_clear, SinkMsg};
use crate::source::{self, Incoming, SourceConfig, SourceCounters};

/// How often the loop wakes while idle, to ping the watchdog and notice signals.
const TICK: Duration = Duration::from_millis(200);
const STATUS_EVERY: Duration = Duration::from_secs(5);

/// Loads everything, runs until stopped, and returns once all records are flushed.
pub fn run(config_path: &Path) -> anyhow::Result<()> {
    let mut cfg = Config::load(config_path)?;
    let mut notify = Notifier::from_env();
    let stop = Arc::new(AtomicBool::new(false));
    let reload = Arc::new(AtomicBool::new(false));
    for sig in [signal_hook::consts::SIGTERM, signal_hook::consts::SIGINT] {
        signal_hook::flag::register(sig, stop.clone())?;
    }
    signal_hook::flag::register(signal_hook::consts::SIGHUP, reload.clone())?;

    let mut engine = build_engine(&cfg)?;
    create_folders(&cfg)?;
    let log = JsonlLog::open(&cfg.log)
        .map_err(|e| anyhow::anyhow!("{}: cannot open the detection log: {e}", cfg.log.path.display()))?;
    // The files a folder source claimed whose records are already on disk.
    let recorded = match cfg.source {
        SourceConfig::Folder { .. } => claims_in(&cfg.log.path)
            .map_err(|e| anyhow::anyhow!("{}: cannot read the detection log: {e}", cfg.log.path.display()))?,
        _ => HashSet::new(),
    };
    let counters = Arc::new(SourceCounters::default());
    let (sinks, sinks_thread) = worker::spawn(log, cfg.log.clone(), &cfg.evidence, counters.clone())?;
    let source_stop = Arc::new(AtomicBool::new(false));
    let running = source::start(&cfg.source, cfg.max_pixels, counters.clone(), source_stop.clone(), &recorded)
        .map_err(|e| anyhow::anyhow!("{}: {e}", config_path.display()))?;
    let m = &engine.bundle().manifest;
    log::info!("bundle {} ({} classes) and source up; log {}", m.name, m.classes.len(), cfg.log.path.display());
    notify.ready("waiting for frames");

    let (mut analysed, mut last_status, mut window_start, mut window_frames) =
        (0u64, Instant::now(), Instant::now(), 0u64);
    loop {
        notify.watchdog();
        if stop.load(Ordering::Relaxed) {
            log::info!("stop requested: finishing");
            break;
        }
        if reload.swap(false, Ordering::Relaxed) {
            match reload_config(config_path, &cfg, &mut engine) {
                Ok(new) => {
                    sinks.send(SinkMsg::Reconfigure { log: new.log.clone(), evidence: new.evidence.clone() }).ok();
                    cfg = new;
                    log::info!("{}: configuration reloaded", config_path.display());
                }
                Err(e) => log::error!("reload rejected, keeping the running configuration: {e:#}"),
            }
        }
        let msg = match running.frames.recv_timeout(TICK) {
            Ok(Incoming { item: Ok(frame), claim }) => {
                let seed = cfg.engine.seed.wrapping_add(frame.seq);
                match engine.analyze(&frame, seed) {
                    Ok(report) => {
                        analysed += 1;
                        window_frames += 1;
                        let image = (cfg.evidence.enabled && not_clear(&report)).then_some(frame.image);
                        SinkMsg::Frame { report: Box::new(report), captured: frame.captured, image, claim }
                    }
                    Err(e) => {
                        log::error!("{}: {e}", frame.origin);
                        SinkMsg::BadFrame { origin: frame.origin, error: e.to_string(), claim }
                    }
                }
            }
            Ok(Incoming { item: Err(bad), claim }) => {
                log::error!("{}", bad.message);
                SinkMsg::BadFrame { origin: bad.origin, error: bad.message, claim }
            }
            Err(RecvTimeoutError::Timeout) => continue,
            Err(RecvTimeoutError::Disconnected) => {
                log::info!("the source has no more frames");
                break;
            }
        };
        if sinks.send(msg).is_err() {
            anyhow::bail!("the sinks thread has stopped");
        }
        if last_status.elapsed() >= STATUS_EVERY {
            let fps = window_frames as f64 / window_start.elapsed().as_secs_f64();
            notify.status(&format!(
                "{fps:.1} frames/s, {analysed} analysed, {} dropped",
                counters.dropped.load(Ordering::Relaxed)
            ));
            (last_status, window_start, window_frames) = (Instant::now(), Instant::now(), 0);
        }
    }
    notify.stopping();
    source_stop.store(true, Ordering::Relaxed);
    drop(running.frames);
    let source_ended = running.thread.join();
    drop(sinks);
    sinks_thread.join().map_err(|_| anyhow::anyhow!("the sinks thread panicked"))?;
    log::info!("stopped after {analysed} frames; log flushed");
    // A source that died is a failure the service manager should see (and restart).
    source_ended.map_err(|_| anyhow::anyhow!("the source thread panicked"))
}

/// Loads the bundle and builds the engine with the config's settings, mask and frame
/// size: what `run` does before it says it is ready, and what `check` checks.
pub fn build_engine(cfg: &Config) -> anyhow::Result<Engine> {
    let bundle = Arc::new(Bundle::load(&cfg.bundle, &cfg.engine.settings.batch_sizes())?);
    cfg.check_classes(bundle.manifest.classes.len())?;
    let mut engine = Engine::new(bundle, cfg.engine.settings.clone())
        .map_err(|e| anyhow::anyhow!("{}: [engine] {e}", cfg.path().display()))?;
    engine.set_mask(cfg.mask()?);
    if let Some((w, h)) = cfg.frame_size() {
        engine.prepare(w, h)?;
    }
    Ok(engine)
}

/// The folders the config writes into, created if missing: the one step of `run` that
/// makes folders (checking a config never does).
fn create_folders(cfg: &Config) -> anyhow::Result<()> {
    for dir in cfg.folders() {
        if !dir.is_dir() {
            folders::create(dir)
                .map_err(|e| anyhow::anyhow!("{}: cannot create {}: {e}", cfg.path().display(), dir.display()))?;
            log::info!("created {}", dir.display());
        }
    }
    Ok(())
}

/// Loads the new config, checks it against what cannot change without a restart, creates
/// its folders, and applies its settings and mask to the engine (plans for new settings
/// are built here, between frames).
fn reload_config(path: &Path, old: &Config, engine: &mut Engine) -> anyhow::Result<Config> {
    let new = Config::load(path)?;
    new.check_classes(engine.bundle().manifest.classes.len())?;
    if new.bundle != old.bundle || new.source != old.source || new.max_pixels != old.max_pixels {
        anyhow::bail!("{}: bundle, max_pixels and [source] change only with a restart", path.display());
    }
    let mask = new.mask()?;
    create_folders(&new)?;
    engine
        .set_settings(new.engine.settings.clone())
        .map_err(|e| anyhow::anyhow!("{}: [engine] {e}", path.display()))?;
    engine.set_mask(mask);
    Ok(new)
}
