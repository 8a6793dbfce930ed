//! The daemon's TOML configuration: parsing, defaults and semantic checks.
//!
//! Unknown keys are errors. Every error names the file, and the line where the offending
//! key is written, and says what was expected.

use std::path::{Path, PathBuf};

use serde::{de, Deserialize, Serialize};

use crate::engine::{Bundle, Mask, MaskConfig, MaskError, Settings};
use crate::sinks::{EvidenceConfig, LogConfig};
use crate::source::{AfterUse, SourceConfig, DEFAULT_MAX_PIXELS};

#[derive(Clone, Debug, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Config {
    /// Model bundle folder (relative paths are relative to the config file).
    pub bundle: PathBuf,
    /// Frames with more pixels are refused from their header.
    #[serde(default = "default_max_pixels")]
    pub max_pixels: u64,
    pub source: SourceConfig,
    #[serde(default)]
    pub engine: EngineSection,
    #[serde(default)]
    pub mask: MaskConfig,
    pub log: LogConfig,
    #[serde(default)]
    pub evidence: EvidenceConfig,
}

fn default_max_pixels() -> u64 {
    DEFAULT_MAX_PIXELS
}

/// The `[engine]` table: the engine's settings, and the daemon's base seed (frame `n` is
/// analysed with seed `seed + n`, recorded in its report).
#[derive(Clone, Debug, Default, PartialEq)]
pub struct EngineSection {
    pub settings: Settings,
    pub seed: u64,
}

impl Serialize for EngineSection {
    fn serialize<S: serde::Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        #[derive(Serialize)]
        struct Flat<'a> {
            #[serde(flatten)]
            settings: &'a Settings,
            seed: u64,
        }
        Flat { settings: &self.settings, seed: self.seed }.serialize(s)
    }
}

impl<'de> Deserialize<'de> for EngineSection {
    /// `seed` is taken aside and every other key goes to [`Settings`], entry by entry, so
    /// that the TOML parser still points its errors at the right key.
    fn deserialize<D: serde::Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        struct Table;
        impl<'de> de::Visitor<'de> for Table {
            type Value = EngineSection;
            fn expecting(&self, f: &mut std::fmt::Formatter) -> std::fmt::Result {
                f.write_str("the [engine] table")
            }
            fn visit_map<A: de::MapAccess<'de>>(self, map: A) -> Result<EngineSection, A::Error> {
                let mut seed = None;
                let settings =
                    Settings::deserialize(de::value::MapAccessDeserializer::new(SeedAside { map, seed: &mut seed }))?;
                Ok(EngineSection { settings, seed: seed.unwrap_or(0) })
            }
        }
        d.deserialize_map(Table)
    }
}

/// The entries of a map, less `seed`, whose value it stores.
struct SeedAside<'s, A> {
    map: A,
    seed: &'s mut Option<u64>,
}

/// A key: `seed` (handing back the wrapped key seed), or what the wrapped seed made of it.
enum Key<K, V> {
    Seed(K),
    Other(V),
}

/// Reads a key as a string and passes it on unless it is `seed`. The key stays inside the
/// TOML parser's own key deserializer, which attaches the key's position to errors.
struct KeySeed<K>(K);

impl<'de, K: de::DeserializeSeed<'de>> de::DeserializeSeed<'de> for KeySeed<K> {
    type Value = Key<K, K::Value>;
    fn deserialize<D: serde::Deserializer<'de>>(self, d: D) -> Result<Self::Value, D::Error> {
        d.deserialize_str(self)
    }
}

impl<'de, K: de::DeserializeSeed<'de>> de::Visitor<'de> for KeySeed<K> {
    type Value = Key<K, K::Value>;
    fn expecting(&self, f: &mut std::fmt::Formatter) -> std::fmt::Result {
        f.write_str("a key")
    }
    fn visit_str<E: de::Error>(self, key: &str) -> Result<Self::Value, E> {
        if key == "seed" {
            return Ok(Key::Seed(self.0));
        }
        self.0.deserialize(de::value::StrDeserializer::<E>::new(key)).map(Key::Other)
    }
}

impl<'de, A: de::MapAccess<'de>> de::MapAccess<'de> for SeedAside<'_, A> {
    type Error = A::Error;
    fn next_key_seed<K: de::DeserializeSeed<'de>>(&mut self, mut seed: K) -> Result<Option<K::Value>, A::Error> {
        loop {
            match self.map.next_key_seed(KeySeed(seed))? {
                None => return Ok(None),
                Some(Key::Other(v)) => return Ok(Some(v)),
                Some(Key::Seed(back)) => {
                    *self.seed = Some(self.map.next_value()?);
                    seed = back;
                }
            }
        }
    }
    fn next_value_seed<V: de::DeserializeSeed<'de>>(&mut self, seed: V) -> Result<V::Value, A::Error> {
        self.map.next_value_seed(seed)
    }
}

#[derive(Debug, thiserror::Error)]
#[error("{path}{}: {message}", at.map(|(l, c)| format!(":{l}:{c}")).unwrap_or_default())]
pub struct ConfigError {
    pub path: PathBuf,
    /// Line and column (1-based) of the offending key or value.
    pub at: Option<(usize, usize)>,
    pub message: String,
}

impl Config {
    /// Reads, parses and checks a config file; relative paths become relative to its folder.
    pub fn load(path: &Path) -> Result<Self, ConfigError> {
        let text = std::fs::read_to_string(path).map_err(|e| ConfigError {
            path: path.into(),
            at: None,
            message: format!("cannot read the config file: {e}"),
        })?;
        Self::parse(&text, path)
    }

    pub fn parse(text: &str, path: &Path) -> Result<Self, ConfigError> {
        let mut c: Config = toml::from_str(text).map_err(|e| {
            let at = e.span().map(|s| position(text, s.start));
            ConfigError { path: path.into(), at, message: e.message().to_string() }
        })?;
        let base = path.parent().unwrap_or(Path::new("."));
        c.resolve_paths(base);
        c.check().map_err(|(key, message)| ConfigError { path: path.into(), at: locate(text, key), message })?;
        Ok(c)
    }

    fn resolve_paths(&mut self, base: &Path) {
        let fix = |p: &mut PathBuf| {
            if p.is_relative() {
                *p = base.join(&*p);
            }
        };
        fix(&mut self.bundle);
        fix(&mut self.log.path);
        fix(&mut self.evidence.dir);
        if let Some(p) = &mut self.mask.image {
            fix(p);
        }
        match &mut self.source {
            SourceConfig::Folder { path, move_to, .. } => {
                fix(path);
                if let Some(m) = move_to {
                    fix(m);
                }
            }
            SourceConfig::Files { paths, .. } => {
                for p in paths.iter_mut() {
                    if Path::new(p).is_relative() {
                        *p = base.join(&*p).to_string_lossy().into_owned();
                    }
                }
            }
            _ => {}
        }
    }

    /// Semantic checks; an error is (the key to point at, the message).
    fn check(&self) -> Result<(), (&'static str, String)> {
        if !self.bundle.join(crate::bundle::MANIFEST).is_file() {
            return Err(("bundle", format!("bundle = {:?}: no bundle.toml there", self.bundle)));
        }
        self.engine.settings.check(None).map_err(|e| (e.field(), format!("[engine] {e}")))?;
        if self.max_pixels == 0 {
            return Err(("max_pixels", "max_pixels = 0: expected a positive pixel count".into()));
        }
        match &self.source {
            SourceConfig::Camera { width, height, fps, formats, .. } => {
                if *width == 0 || *height == 0 || *fps == 0 {
                    return Err(("width", "[source] camera width, height and fps must be positive".into()));
                }
                if let Some(f) = formats.iter().find(|f| !["mjpeg", "yuyv", "nv12"].contains(&f.as_str())) {
                    return Err((
                        "formats",
                        format!("[source] formats: {f:?} is not one of \"mjpeg\", \"yuyv\", \"nv12\""),
                    ));
                }
            }
            SourceConfig::Folder { path, after, move_to, stable_ms, poll_ms, .. } => {
                if !path.is_dir() {
                    return Err(("path", format!("[source] path = {path:?}: not a folder")));
                }
                match (after, move_to) {
                    (AfterUse::Move, None) => {
                        return Err(("after", "[source] after = \"move\" needs move_to = \"FOLDER\"".into()))
                    }
                    (AfterUse::Move, Some(m)) => {
                        creatable(m).map_err(|e| ("move_to", format!("[source] move_to: {e}")))?
                    }
                    _ => {}
                }
                if *poll_ms == 0 || *stable_ms == 0 {
                    return Err(("poll_ms", "[source] poll_ms and stable_ms must be positive".into()));
                }
            }
            SourceConfig::Files { paths, rate_fps, .. } => {
                if paths.is_empty() {
                    return Err(("paths", "[source] paths: expected at least one file or glob pattern".into()));
                }
                if !(*rate_fps >= 0.0 && rate_fps.is_finite()) {
                    return Err((
                        "rate_fps",
                        format!("[source] rate_fps = {rate_fps}: expected 0 (as fast as possible) or a positive rate"),
                    ));
                }
            }
            SourceConfig::Scene { width, height, fps, .. } => {
                if *width < 64 || *height < 64 {
                    return Err(("width", "[source] scene width and height must be at least 64".into()));
                }
                if !(*fps > 0.0 && fps.is_finite()) {
                    return Err(("fps", format!("[source] fps = {fps}: expected a positive rate")));
                }
            }
        }
        if let Some(p) = &self.mask.image {
            if !p.is_file() {
                return Err(("image", format!("[mask] image = {p:?}: file not found")));
            }
            if !self.mask.ignore.is_empty() {
                return Err(("ignore", "[mask] give either image or ignore, not both".into()));
            }
        }
        if let Some(size) = self.frame_size() {
            if let Some(mask) = self.mask().map_err(|e| (e.field(), format!("[mask] {e}")))? {
                mask.check(size.0, size.1).map_err(|e| (e.field(), format!("[mask] {e}")))?;
            }
        }
        let log = &self.log;
        creatable(log.path.parent().unwrap_or(Path::new("."))).map_err(|e| ("path", format!("[log] path: {e}")))?;
        if !(log.rotate_mb > 0.0) || log.keep == 0 {
            return Err(("rotate_mb", "[log] rotate_mb must be positive and keep at least 1".into()));
        }
        if !(log.sync_interval_s > 0.0) || !(log.health_interval_s > 0.0) {
            return Err(("health_interval_s", "[log] sync_interval_s and health_interval_s must be positive".into()));
        }
        let ev = &self.evidence;
        if ev.enabled {
            creatable(&ev.dir).map_err(|e| ("dir", format!("[evidence] dir: {e}")))?;
            if !(ev.quota_mb > 0.0) || !(ev.max_age_hours > 0.0) {
                return Err(("quota_mb", "[evidence] quota_mb and max_age_hours must be positive".into()));
            }
        }
        Ok(())
    }

    /// Checks what depends on the loaded bundle: one threshold per class.
    pub fn check_bundle(&self, path: &Path, bundle: &Bundle) -> Result<(), String> {
        self.engine
            .settings
            .check(Some(bundle.manifest.classes.len()))
            .map_err(|e| format!("{}: [engine] {e}", path.display()))
    }

    /// The frame size when the source fixes it in the config.
    pub fn frame_size(&self) -> Option<(u32, u32)> {
        self.source.frame_size()
    }

    /// The configured mask, if any.
    pub fn mask(&self) -> Result<Option<Mask>, MaskError> {
        self.mask.load()
    }
}

/// The folder exists or can be created, and is writable.
fn creatable(dir: &Path) -> Result<(), String> {
    std::fs::create_dir_all(dir).map_err(|e| format!("{dir:?} cannot be created: {e}"))?;
    let probe = dir.join(format!(".saccade-write-test-{}", std::process::id()));
    std::fs::write(&probe, b"").map_err(|e| format!("{dir:?} is not writable: {e}"))?;
    std::fs::remove_file(&probe).ok();
    Ok(())
}

/// Line and column (1-based) of a byte offset.
fn position(text: &str, offset: usize) -> (usize, usize) {
    let before = &text[..offset.min(text.len())];
    let line_start = before.rfind('\n').map_or(0, |i| i + 1);
    (before.matches('\n').count() + 1, before[line_start..].chars().count() + 1)
}

/// Line and column of the first `key = …` in the text.
fn locate(text: &str, key: &str) -> Option<(usize, usize)> {
    let mut offset = 0;
    for l in text.split_inclusive('\n') {
        let indent = l.len() - l.trim_start().len();
        if l.trim_start().strip_prefix(key).is_some_and(|rest| rest.trim_start().starts_with('=')) {
            return Some(position(text, offset + indent));
        }
        offset += l.len();
    }
    None
}
