//! The daemon's configuration file. It gathers the tables that the parts own
//! ([`SourceConfig`], the engine's [`Settings`] and [`MaskConfig`], the sinks'
//! [`LogConfig`] and [`EvidenceConfig`]), parses them, and locates every error: the file,
//! and the line and column of the key in its own table.
//!
//! Unknown keys are errors. Checking a config reads the disk but never writes to it; the
//! folders the daemon writes into are created by `saccade run` ([`Config::folders`]).

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use serde::{de, Deserialize, Serialize};
use toml::de::{DeTable, DeValue};

use crate::bundle::MANIFEST;
use crate::engine::{Mask, MaskConfig, MaskError, Settings, SettingsError};
use crate::sinks::{EvidenceConfig, LogConfig, SinkConfigError};
use crate::source::{SourceConfig, SourceConfigError, DEFAULT_MAX_PIXELS};

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
    /// Where the config came from, to locate errors found after parsing.
    #[serde(skip)]
    origin: Origin,
}

/// Largest accepted `max_pixels`: a gigapixel frame is 3 GB as RGB8.
pub const MAX_PIXELS_LIMIT: u64 = 1_000_000_000;

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

/// A config error: the file, the line and column of the key when there is one, and what
/// is wrong.
#[derive(Debug, thiserror::Error)]
#[error("{}{}: {problem}", path.display(), at.map(|(l, c)| format!(":{l}:{c}")).unwrap_or_default())]
pub struct ConfigError {
    pub path: PathBuf,
    /// Line and column (1-based) of the offending key or value.
    pub at: Option<(usize, usize)>,
    /// Boxed: errors are rare and the Ok path stays small.
    pub problem: Box<ConfigProblem>,
}

#[derive(Debug, thiserror::Error)]
pub enum ConfigProblem {
    #[error("cannot read the config file: {0}")]
    Read(std::io::Error),
    /// TOML syntax, a wrong type, a missing or unknown key: the parser's message.
    #[error("{0}")]
    Parse(String),
    #[error("bundle = {0:?}: no {MANIFEST} there")]
    NoBundle(PathBuf),
    #[error("max_pixels = {0}: expected 1 to {MAX_PIXELS_LIMIT} pixels")]
    MaxPixels(u64),
    #[error("[source] {0}")]
    Source(#[from] SourceConfigError),
    #[error("[engine] {0}")]
    Engine(#[from] SettingsError),
    #[error("[mask] {0}")]
    Mask(#[from] MaskError),
    #[error("[log] {0}")]
    Log(SinkConfigError),
    #[error("[evidence] {0}")]
    Evidence(SinkConfigError),
}

impl ConfigProblem {
    /// The dotted key (`log.path`) the problem is about, when it is about one.
    pub fn key(&self) -> Option<String> {
        Some(match self {
            Self::Read(_) | Self::Parse(_) => return None,
            Self::NoBundle(_) => "bundle".into(),
            Self::MaxPixels(_) => "max_pixels".into(),
            Self::Source(e) => format!("source.{}", e.field()),
            Self::Engine(e) => format!("engine.{}", e.field()),
            Self::Mask(e) => format!("mask.{}", e.field()),
            Self::Log(e) => format!("log.{}", e.field()),
            Self::Evidence(e) => format!("evidence.{}", e.field()),
        })
    }
}

/// The config file and where each key is written in it.
#[derive(Clone, Debug, Default)]
struct Origin {
    path: PathBuf,
    /// Dotted key path → line and column (1-based) of the key.
    keys: BTreeMap<String, (usize, usize)>,
}

impl Origin {
    fn new(path: &Path, text: &str, table: &DeTable) -> Self {
        let mut keys = BTreeMap::new();
        index_keys(text, table, "", &mut keys);
        Self { path: path.to_path_buf(), keys }
    }

    /// The error located at its key; a key absent from the file (a default value) falls
    /// back to its table's header, then to the file alone.
    fn error(&self, problem: ConfigProblem) -> ConfigError {
        let at = problem.key().and_then(|key| {
            let table = key.split_once('.').map(|(t, _)| t.to_string());
            self.keys.get(&key).or_else(|| table.and_then(|t| self.keys.get(&t))).copied()
        });
        ConfigError { path: self.path.clone(), at, problem: Box::new(problem) }
    }
}

/// Records the position of every key, tables and inline tables included.
fn index_keys(text: &str, table: &DeTable, prefix: &str, out: &mut BTreeMap<String, (usize, usize)>) {
    for (key, value) in table {
        let path = format!("{prefix}{}", key.get_ref());
        out.insert(path.clone(), position(text, key.span().start));
        if let DeValue::Table(t) = value.get_ref() {
            index_keys(text, t, &format!("{path}."), out);
        }
    }
}

impl Config {
    /// Reads, parses and checks a config file; relative paths become relative to its folder.
    pub fn load(path: &Path) -> Result<Self, ConfigError> {
        let text = std::fs::read_to_string(path).map_err(|e| ConfigError {
            path: path.into(),
            at: None,
            problem: Box::new(ConfigProblem::Read(e)),
        })?;
        Self::parse(&text, path)
    }

    /// Parses and checks config text read from `path`.
    pub fn parse(text: &str, path: &Path) -> Result<Self, ConfigError> {
        let parse_error = |e: toml::de::Error| ConfigError {
            path: path.into(),
            at: e.span().map(|s| position(text, s.start)),
            problem: Box::new(ConfigProblem::Parse(e.message().to_string())),
        };
        let table = DeTable::parse(text).map_err(parse_error)?;
        let mut c: Config = toml::from_str(text).map_err(parse_error)?;
        c.origin = Origin::new(path, text, table.get_ref());
        c.resolve_paths(path.parent().unwrap_or(Path::new(".")));
        c.check().map_err(|problem| c.origin.error(problem))?;
        Ok(c)
    }

    fn resolve_paths(&mut self, base: &Path) {
        let fix = |p: &mut PathBuf| *p = base.join(&*p);
        fix(&mut self.bundle);
        fix(&mut self.log.path);
        fix(&mut self.evidence.dir);
        if let Some(p) = &mut self.mask.image {
            fix(p);
        }
        self.source.resolve_paths(base);
    }

    /// Checks every table; reads the disk (the bundle's manifest, the source folder, the
    /// mask image, the folders to write into) and writes nothing.
    fn check(&self) -> Result<(), ConfigProblem> {
        if !self.bundle.join(MANIFEST).is_file() {
            return Err(ConfigProblem::NoBundle(self.bundle.clone()));
        }
        if !(1..=MAX_PIXELS_LIMIT).contains(&self.max_pixels) {
            return Err(ConfigProblem::MaxPixels(self.max_pixels));
        }
        self.source.check()?;
        self.engine.settings.check(None)?;
        self.mask.check(self.frame_size())?;
        self.log.check().map_err(ConfigProblem::Log)?;
        self.evidence.check().map_err(ConfigProblem::Evidence)?;
        Ok(())
    }

    /// Checks what depends on the loaded bundle: one threshold per class.
    pub fn check_classes(&self, classes: usize) -> Result<(), ConfigError> {
        self.engine.settings.check(Some(classes)).map_err(|e| self.origin.error(e.into()))
    }

    /// The file this config was read from.
    pub fn path(&self) -> &Path {
        &self.origin.path
    }

    /// The frame size when the source fixes it in the config.
    pub fn frame_size(&self) -> Option<(u32, u32)> {
        self.source.frame_size()
    }

    /// The configured mask, if any, located like any other config error.
    pub fn mask(&self) -> Result<Option<Mask>, ConfigError> {
        self.mask.load().map_err(|e| self.origin.error(e.into()))
    }

    /// The folders the daemon writes into: `saccade run` creates those that are missing.
    pub fn folders(&self) -> Vec<&Path> {
        let mut v = self.source.folders();
        v.push(self.log.folder());
        if self.evidence.enabled {
            v.push(&self.evidence.dir);
        }
        v
    }
}

/// Line and column (1-based) of a byte offset.
fn position(text: &str, offset: usize) -> (usize, usize) {
    let before = &text[..offset.min(text.len())];
    let line_start = before.rfind('\n').map_or(0, |i| i + 1);
    (before.matches('\n').count() + 1, before[line_start..].chars().count() + 1)
}
