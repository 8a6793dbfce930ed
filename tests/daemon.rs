//! `saccade run` as a process: sources, log integrity, signals, overload, notifications,
//! unit files and config errors.

mod common;

use std::os::unix::net::UnixDatagram;
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::time::{Duration, Instant};

use image::RgbImage;
use saccade::config::Config;
use saccade::demo::designed::DesignedParams;
use saccade::demo::scene;
use serde_json::Value;

const BIN: &str = env!("CARGO_BIN_EXE_saccade");

struct Setup {
    dir: tempfile::TempDir,
    _bundle: tempfile::TempDir,
    bundle: PathBuf,
}

impl Setup {
    fn new() -> Self {
        let bundle = common::designed_bundle(&DesignedParams::default());
        Self { bundle: bundle.path().to_path_buf(), _bundle: bundle, dir: tempfile::tempdir().unwrap() }
    }

    fn path(&self, p: &str) -> PathBuf {
        self.dir.path().join(p)
    }

    /// A `[source]` table that plays the files matching `glob` (in the test's folder)
    /// over and over at `rate_fps`.
    fn repeating(&self, glob: &str, rate_fps: f64) -> String {
        format!(
            "kind = \"files\"\npaths = [{:?}]\nrate_fps = {rate_fps}\nrepeat = true",
            self.path(glob).display().to_string()
        )
    }

    fn log(&self) -> PathBuf {
        self.path("log/detections.jsonl")
    }

    /// Writes a config with the given source and extra sections.
    fn config(&self, source: &str, engine: &str, log_extra: &str) -> PathBuf {
        let text = format!(
            "bundle = {:?}\n\n[source]\n{source}\n\n[engine]\n{engine}\n\n[log]\npath = {:?}\n{log_extra}\n",
            self.bundle.display().to_string(),
            self.log().display().to_string()
        );
        let path = self.path("saccade.toml");
        std::fs::write(&path, text).unwrap();
        path
    }

    /// JPEG frames from the demo scene, written into `dir` (created).
    fn frames(&self, dir: &str, n: usize, w: u32, h: u32) -> Vec<PathBuf> {
        let d = self.path(dir);
        std::fs::create_dir_all(&d).unwrap();
        (0..n)
            .map(|i| {
                let p = d.join(format!("f{i:03}.jpg"));
                scene::generate(w, h, 100 + i as u64).image.save(&p).unwrap();
                p
            })
            .collect()
    }

    fn spawn(&self, config: &Path, envs: &[(&str, &str)]) -> Child {
        let mut c = Command::new(BIN);
        c.args(["run", "--config", config.to_str().unwrap()])
            .stdout(Stdio::null())
            .stderr(std::fs::File::create(self.path("stderr.txt")).unwrap());
        c.env_remove("NOTIFY_SOCKET").env_remove("WATCHDOG_USEC");
        for (k, v) in envs {
            c.env(k, v);
        }
        c.spawn().unwrap()
    }

    fn stderr(&self) -> String {
        std::fs::read_to_string(self.path("stderr.txt")).unwrap_or_default()
    }

    fn records(&self) -> Vec<Value> {
        saccade::sinks::jsonl::read_records(&self.log()).unwrap_or_default()
    }
}

fn signal(child: &Child, sig: i32) {
    assert_eq!(unsafe { libc::kill(child.id() as i32, sig) }, 0);
}

/// Polls until `f` holds or `secs` pass.
fn wait_for(secs: u64, what: &str, mut f: impl FnMut() -> bool) {
    let end = Instant::now() + Duration::from_secs(secs);
    while !f() {
        assert!(Instant::now() < end, "timed out waiting for {what}");
        std::thread::sleep(Duration::from_millis(100));
    }
}

fn stop(child: &mut Child) -> std::process::ExitStatus {
    signal(child, libc::SIGTERM);
    let end = Instant::now() + Duration::from_secs(30);
    loop {
        if let Some(s) = child.try_wait().unwrap() {
            return s;
        }
        assert!(Instant::now() < end, "daemon did not stop after SIGTERM");
        std::thread::sleep(Duration::from_millis(50));
    }
}

fn kind(records: &[Value], k: &str) -> Vec<Value> {
    records.iter().filter(|r| r["record"] == k).cloned().collect()
}

/// Validates the log with Python's `jsonschema` against the repository's schema.
fn validate(log: &Path) -> Value {
    let schema = Path::new(env!("CARGO_MANIFEST_DIR")).join("config/record.schema.json");
    serde_json::from_str(&common::run_reference(
        "validate_records.py",
        &[schema.to_str().unwrap(), log.to_str().unwrap()],
        "",
    ))
    .unwrap()
}

#[test]
fn folder_source_end_to_end_with_bad_frames() {
    let s = Setup::new();
    let inbox = s.path("inbox");
    std::fs::create_dir_all(&inbox).unwrap();
    let staged = s.frames("staged", 6, 1024, 768);
    let cfg = s.config(
        &format!("kind = \"folder\"\npath = {:?}\nafter = \"move\"\nmove_to = {:?}\nstable_ms = 200\npoll_ms = 50\noverload = \"wait\"", inbox.display().to_string(), s.path("done").display().to_string()),
        "budget_ms = 50",
        &format!(
            "records = \"all\"\nsync = \"always\"\n\n[evidence]\nenabled = true\ndir = {:?}",
            s.path("evidence").display().to_string()
        ),
    );
    let mut child = s.spawn(&cfg, &[]);
    // Good frames arrive by rename into place, as a well-behaved producer does.
    for p in &staged[..3] {
        std::fs::rename(p, inbox.join(p.file_name().unwrap())).unwrap();
    }
    // Bad ones: corrupt, truncated, empty, and a header claiming 100 000 × 100 000 pixels.
    let good = std::fs::read(inbox.join("f000.jpg")).unwrap();
    let mut corrupt = good.clone();
    let n = corrupt.len();
    corrupt[20..n - 2].iter_mut().enumerate().for_each(|(k, b)| *b = (k * 31 % 251) as u8);
    std::fs::write(inbox.join("corrupt.jpg"), corrupt).unwrap();
    std::fs::write(inbox.join("truncated.jpg"), &good[..good.len() / 2]).unwrap();
    std::fs::write(inbox.join("empty.jpg"), b"").unwrap();
    std::fs::write(inbox.join("huge.pnm"), b"P6\n100000 100000\n255\n").unwrap();
    // A partial write in progress under a temporary name is not taken.
    std::fs::write(inbox.join("f900.jpg.part"), &good[..100]).unwrap();
    // After the bad ones the daemon goes on.
    wait_for(60, "the first frames", || kind(&s.records(), "error").len() == 4);
    for p in &staged[3..] {
        std::fs::rename(p, inbox.join(p.file_name().unwrap())).unwrap();
    }
    wait_for(60, "six frame records", || kind(&s.records(), "frame").len() == 6);
    assert!(stop(&mut child).success(), "{}", s.stderr());

    let recs = s.records();
    let frames = kind(&recs, "frame");
    let mut origins: Vec<String> = frames
        .iter()
        .map(|r| Path::new(r["origin"].as_str().unwrap()).file_name().unwrap().to_string_lossy().into_owned())
        .collect();
    origins.sort();
    assert_eq!(origins, (0..6).map(|i| format!("f{i:03}.jpg")).collect::<Vec<_>>(), "one record per frame");
    let errors: Vec<String> = kind(&recs, "error").iter().map(|r| format!("{} {}", r["origin"], r["error"])).collect();
    for (name, why) in [
        ("corrupt.jpg", "corrupt"),
        ("truncated.jpg", "truncated"),
        ("empty.jpg", "empty file"),
        ("huge.pnm", "over the limit"),
    ] {
        assert!(errors.iter().any(|e| e.contains(name) && e.contains(why)), "{name}: {errors:?}");
    }
    assert_eq!(kind(&recs, "health").len(), 1, "a final health record at exit");
    assert_eq!(kind(&recs, "health")[0]["errors"], 4);
    // Used files were moved, none is left claimed; the partial one was left alone.
    let mut left: Vec<_> = std::fs::read_dir(&inbox).unwrap().map(|e| e.unwrap().file_name()).collect();
    left.sort();
    assert_eq!(left, [".saccade-claimed", "f900.jpg.part"].map(std::ffi::OsString::from));
    assert_eq!(std::fs::read_dir(inbox.join(".saccade-claimed")).unwrap().count(), 0);
    assert_eq!(std::fs::read_dir(s.path("done")).unwrap().count(), 10);

    // Compact records: no per-patch list by default; findings name their patches; the
    // evidence files a record names exist, and decode at their documented sizes.
    assert!(frames.iter().all(|r| r.get("patches").is_none()), "no patch list by default");
    let with_evidence: Vec<&Value> = frames.iter().filter(|r| r.get("evidence").is_some()).collect();
    assert!(!with_evidence.is_empty(), "the designed bundle flags the generated frames' dark spots");
    for r in &with_evidence {
        let ev = &r["evidence"];
        let overview = image::open(ev["overview"].as_str().unwrap()).unwrap();
        let (w, h) = (r["width"].as_u64().unwrap() as u32, r["height"].as_u64().unwrap() as u32);
        assert_eq!((overview.width(), overview.height()), saccade::sinks::evidence::overview_size(w, h));
        let spots: Vec<&Value> = r["classes"]
            .as_array()
            .unwrap()
            .iter()
            .filter(|c| c["outcome"] != "clear")
            .flat_map(|c| c["patches"].as_array().unwrap())
            .collect();
        assert_eq!(ev["crops"].as_array().unwrap().len(), spots.len().min(4), "{r}");
        for c in ev["crops"].as_array().unwrap() {
            let img = image::open(c.as_str().unwrap()).unwrap();
            let size = spots[0]["size"].as_u64().unwrap() as u32;
            assert_eq!((img.width(), img.height()), saccade::sinks::evidence::crop_size(size), "{c}");
        }
    }

    let v = validate(&s.log());
    assert_eq!(v["problems"], Value::Array(vec![]), "{v}");
    assert_eq!(v["records"], recs.len());
    assert_eq!(v["partial_last_line"], false);
    // The validator does check RFC 3339 times: a negative control.
    let bad = s.path("bad.jsonl");
    std::fs::write(
        &bad,
        serde_json::to_string(&recs[0]).unwrap().replace(recs[0]["time"].as_str().unwrap(), "2026-12-02 10:00") + "\n",
    )
    .unwrap();
    assert_ne!(validate(&bad)["problems"], Value::Array(vec![]));
}

#[test]
fn sighup_applies_a_good_config_and_keeps_the_old_one_on_a_bad_one() {
    let s = Setup::new();
    s.frames("frames", 2, 640, 480);
    let source = s.repeating("frames/*.jpg", 20.0);
    let cfg = s.config(&source, "budget_ms = 40", "");
    let mut child = s.spawn(&cfg, &[]);
    wait_for(60, "records at 40 ms", || kind(&s.records(), "frame").len() >= 3);
    s.config(&source, "budget_ms = 45", "");
    signal(&child, libc::SIGHUP);
    wait_for(30, "records at 45 ms", || s.records().iter().any(|r| r["budget_ms"] == 45.0));
    s.config(&source, "budget_ms = -3", "");
    signal(&child, libc::SIGHUP);
    wait_for(30, "the rejection", || s.stderr().contains("reload rejected"));
    let before = kind(&s.records(), "frame").len();
    wait_for(30, "records after the rejection", || kind(&s.records(), "frame").len() > before + 3);
    assert!(stop(&mut child).success());
    let err = s.stderr();
    assert!(err.contains("budget_ms = -3") && err.contains("saccade.toml"), "{err}");
    let frames = kind(&s.records(), "frame");
    assert!(frames[before..].iter().all(|r| r["budget_ms"] == 45.0));
    // SIGTERM flushed everything: the file ends with a complete line.
    assert!(std::fs::read(s.log()).unwrap().ends_with(b"\n"));
}

#[test]
fn kill_9_leaves_only_complete_lines_and_a_restart_goes_on() {
    let s = Setup::new();
    s.frames("frames", 3, 640, 480);
    let source =
        format!("kind = \"files\"\npaths = [{:?}]\nrepeat = true", s.path("frames/*.jpg").display().to_string());
    let cfg = s.config(&source, "budget_ms = 10\nmax_patches = 8", "sync = \"never\"");
    for round in 0..3 {
        let mut child = s.spawn(&cfg, &[]);
        let before = s.records().len();
        wait_for(60, "records", || s.records().len() > before + 20);
        std::thread::sleep(Duration::from_millis(137 * round));
        child.kill().unwrap(); // SIGKILL
        child.wait().unwrap();
        let text = std::fs::read_to_string(s.log()).unwrap();
        let lines: Vec<&str> = text.split('\n').collect();
        // Every complete line is valid JSON; only the last may be partial.
        for l in &lines[..lines.len() - 1] {
            assert!(serde_json::from_str::<Value>(l).is_ok(), "round {round}: bad line {l:?}");
        }
    }
    let mut child = s.spawn(&cfg, &[]);
    let before = s.records().len();
    wait_for(60, "records after restart", || s.records().len() > before + 5);
    assert!(stop(&mut child).success());
    let v = validate(&s.log());
    assert_eq!(v["problems"], Value::Array(vec![]), "{v}");
}

fn rss_kb(pid: u32) -> u64 {
    let status = std::fs::read_to_string(format!("/proc/{pid}/status")).unwrap();
    status.lines().find(|l| l.starts_with("VmRSS:")).and_then(|l| l.split_whitespace().nth(1)).unwrap().parse().unwrap()
}

#[test]
fn overload_drops_frames_keeps_memory_flat_and_age_bounded() {
    let s = Setup::new();
    // Overload that holds on any machine, fast or slow, idle or loaded: the source offers
    // frames as fast as it can read them (PNM, a header and a copy: no decompression),
    // while every analysis runs the feature network over every cell of its frame
    // (exhaustive: 450 patches here). Both run on the same machine, so analysis stays far
    // slower than the offer whatever the machine's speed.
    let dir = s.path("frames");
    std::fs::create_dir_all(&dir).unwrap();
    for i in 0..4u64 {
        scene::generate(800, 600, 100 + i).image.save(dir.join(format!("f{i:03}.ppm"))).unwrap();
    }
    let source = s.repeating("frames/*.ppm", 0.0) + "\noverload = \"drop_oldest\"";
    let cfg = s.config(&source, "estimator = \"exhaustive\"", "health_interval_s = 1\nrecords = \"not_clear\"");
    let mut child = s.spawn(&cfg, &[]);
    wait_for(60, "the first health record", || !kind(&s.records(), "health").is_empty());
    std::thread::sleep(Duration::from_secs(2));
    let early = rss_kb(child.id());
    std::thread::sleep(Duration::from_secs(6));
    let late = rss_kb(child.id());
    assert!(stop(&mut child).success());
    // Flat: a queue that kept every frame would grow by about 1.4 MB per frame offered.
    assert!(late < early + 20_000, "RSS grew from {early} kB to {late} kB");
    let health = kind(&s.records(), "health");
    let last = health.last().unwrap();
    let (analysed, dropped) = (last["analysed"].as_u64().unwrap(), last["dropped"].as_u64().unwrap());
    assert!(dropped > analysed, "dropped {dropped}, analysed {analysed}");
    // Bounded: at most one frame waits, so age stays near one analysis; an unbounded
    // queue would have aged frames by seconds after this long.
    for h in &health[1..health.len() - 1] {
        assert!(h["age_ms"]["p99"].as_f64().unwrap() < 2000.0, "{h}");
    }
}

#[test]
fn notifies_ready_watchdog_status_and_stopping() {
    let s = Setup::new();
    s.frames("frames", 2, 640, 480);
    let sock_path = s.path("notify.sock");
    let sock = UnixDatagram::bind(&sock_path).unwrap();
    sock.set_read_timeout(Some(Duration::from_millis(200))).unwrap();
    let source = s.repeating("frames/*.jpg", 5.0);
    let cfg = s.config(&source, "budget_ms = 20", "");
    let mut child = s.spawn(&cfg, &[("NOTIFY_SOCKET", sock_path.to_str().unwrap()), ("WATCHDOG_USEC", "500000")]);
    let mut msgs = Vec::new();
    let mut buf = [0u8; 4096];
    let end = Instant::now() + Duration::from_secs(7);
    while Instant::now() < end {
        if let Ok(n) = sock.recv(&mut buf) {
            msgs.push(String::from_utf8_lossy(&buf[..n]).into_owned());
        }
    }
    signal(&child, libc::SIGTERM);
    // Wait for the exit before reading the rest: on a loaded machine the last message
    // may come later than any fixed wait; once the daemon is gone, all it sent is queued.
    assert!(child.wait().unwrap().success());
    while let Ok(n) = sock.recv(&mut buf) {
        msgs.push(String::from_utf8_lossy(&buf[..n]).into_owned());
    }
    // sd_notify(3): newline-separated assignments; READY=1 first, STOPPING=1 at the end.
    assert!(msgs[0].lines().any(|l| l == "READY=1"), "{msgs:?}");
    let pings = msgs.iter().filter(|m| m.lines().any(|l| l == "WATCHDOG=1")).count();
    assert!(pings >= 5, "{pings} watchdog pings in 7 s at a 0.5 s watchdog: {msgs:?}");
    assert!(
        msgs.iter().any(|m| m.starts_with("STATUS=") && m.contains("frames/s") && m.contains("dropped")),
        "{msgs:?}"
    );
    assert!(msgs.last().unwrap().lines().any(|l| l == "STOPPING=1"), "{msgs:?}");
}

#[test]
fn unit_files_pass_systemd_analyze_verify() {
    let dir = tempfile::tempdir().unwrap();
    let units = Path::new(env!("CARGO_MANIFEST_DIR")).join("systemd");
    // verify checks that ExecStart exists, so point the units at the built binary.
    for (from, to) in [("saccade.service", "saccade.service"), ("saccade@.service", "saccade@mast-north.service")] {
        let text = std::fs::read_to_string(units.join(from)).unwrap().replace("/usr/local/bin/saccade", BIN);
        std::fs::write(dir.path().join(to), text).unwrap();
    }
    let out = Command::new("systemd-analyze")
        .arg("verify")
        .args(["saccade.service", "saccade@mast-north.service"].map(|u| dir.path().join(u)))
        .output()
        .expect("systemd-analyze (Debian package systemd; tests/run installs it)");
    let text = format!("{}{}", String::from_utf8_lossy(&out.stdout), String::from_utf8_lossy(&out.stderr));
    assert!(out.status.success() && text.trim().is_empty(), "systemd-analyze verify: {text}");
}

#[test]
fn config_errors_name_file_line_and_field() {
    let s = Setup::new();
    let cfg = s.config("kind = \"scene\"", "budget_ms = 100", "");
    let text = std::fs::read_to_string(&cfg).unwrap();
    let err = |t: &str| Config::parse(t, &cfg).unwrap_err().to_string();
    let line_of = |t: &str, key: &str| t.lines().position(|l| l.starts_with(key)).unwrap() + 1;

    let t = text.replace("budget_ms = 100", "budget_ms = 100\nbudget = 3");
    let e = err(&t);
    assert!(
        e.contains(&format!("saccade.toml:{}:1:", line_of(&t, "budget ="))) && e.contains("unknown field `budget`"),
        "{e}"
    );
    let t = text.replace("budget_ms = 100", "budget_ms = \"fast\"");
    let e = err(&t);
    assert!(e.contains(&format!(":{}:13:", line_of(&t, "budget_ms"))) && e.contains("invalid type"), "{e}");
    let t = text.replace("budget_ms = 100", "budget_ms = 0");
    let e = err(&t);
    assert!(e.contains(&format!(":{}:1:", line_of(&t, "budget_ms"))) && e.contains("budget_ms = 0"), "{e}");
    let t = text.replace("kind = \"scene\"", "kind = \"folder\"\npath = \"/nonexistent/inbox\"");
    assert!(err(&t).contains("not a folder"));
    let t = format!("{text}\n[mask]\nignore = [{{ x = 2400, y = 0, width = 100, height = 10 }}]\n");
    assert!(err(&t).contains("outside the 2448×2048 frame"), "{}", err(&t));
    assert!(Config::parse(&text, &cfg).is_ok());

    // A key that two tables share is located in the table the error is about: here
    // [log] path (its folder would be under a file), not [source] path.
    let inbox = s.path("inbox");
    std::fs::create_dir_all(&inbox).unwrap();
    std::fs::write(s.path("blocker"), b"x").unwrap();
    let t = text
        .replace("kind = \"scene\"", &format!("kind = \"folder\"\npath = {:?}", inbox.display().to_string()))
        .replace(
            &format!("path = {:?}", s.log().display().to_string()),
            &format!("path = {:?}", s.path("blocker/log/detections.jsonl").display().to_string()),
        );
    let e = err(&t);
    let log_line = t.lines().position(|l| l.contains("blocker/log")).unwrap() + 1;
    assert!(
        e.contains(&format!("saccade.toml:{log_line}:1:")) && e.contains("[log] path") && e.contains("not a folder"),
        "{e}"
    );
    // The same in [engine]: a range error found after parsing points at its own key.
    let t = text.replace("budget_ms = 100", "budget_ms = 100\nmin_patches = 9\nmax_patches = 8");
    let e = err(&t);
    assert!(e.contains(&format!(":{}:1:", line_of(&t, "max_patches"))) && e.contains("[engine] max_patches"), "{e}");
    // The outcome targets are range-checked and located the same way.
    let t = text.replace(
        "budget_ms = 100",
        "budget_ms = 100
false_alarm_target = 1.5",
    );
    let e = err(&t);
    assert!(
        e.contains(&format!(":{}:1:", line_of(&t, "false_alarm_target")))
            && e.contains("[engine] false_alarm_target = 1.5"),
        "{e}"
    );
}

/// Every path under `dir`, sorted.
fn listing(dir: &Path) -> Vec<PathBuf> {
    let mut out = Vec::new();
    let mut todo = vec![dir.to_path_buf()];
    while let Some(d) = todo.pop() {
        for e in std::fs::read_dir(&d).unwrap() {
            let p = e.unwrap().path();
            if p.is_dir() {
                todo.push(p.clone());
            }
            out.push(p);
        }
    }
    out.sort();
    out
}

#[test]
fn checking_a_config_writes_nothing_and_run_makes_its_folders() {
    let s = Setup::new();
    s.frames("inbox", 1, 320, 240);
    let (done, evidence) = (s.path("done"), s.path("evidence/today"));
    let source = format!(
        "kind = \"folder\"\npath = {:?}\nafter = \"move\"\nmove_to = {:?}\nstable_ms = 100\npoll_ms = 50",
        s.path("inbox").display().to_string(),
        done.display().to_string()
    );
    let cfg = s.config(&source, "", "");
    let text = std::fs::read_to_string(&cfg).unwrap();
    std::fs::write(&cfg, format!("{text}\n[evidence]\nenabled = true\ndir = {:?}\n", evidence.display().to_string()))
        .unwrap();
    let before = listing(s.dir.path());

    Config::load(&cfg).unwrap();
    let out = Command::new(BIN).args(["check", "--config", cfg.to_str().unwrap()]).output().unwrap();
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(out.status.success(), "{stderr}");
    assert!(stderr.contains("run will create") && stderr.contains("evidence/today"), "{stderr}");
    assert_eq!(listing(s.dir.path()), before, "checking the config wrote to disk");

    let mut child = s.spawn(&cfg, &[]);
    wait_for(60, "the frame record", || !kind(&s.records(), "frame").is_empty());
    assert!(stop(&mut child).success(), "{}", s.stderr());
    for dir in [done, evidence, s.log().parent().unwrap().to_path_buf()] {
        assert!(dir.is_dir(), "run did not create {}", dir.display());
    }
}

#[test]
fn shipped_configs_parse_and_check_prints_the_effective_config() {
    let root = Path::new(env!("CARGO_MANIFEST_DIR"));
    // The reference lists every key: it must deserialise (unknown keys would fail).
    let text = std::fs::read_to_string(root.join("config/saccade.toml")).unwrap();
    let c: Config = toml::from_str(&text).unwrap();
    assert_eq!(c.log.keep, 5);
    // The quick start runs on a fresh checkout: its bundle is the one in the source tree,
    // and loading it creates nothing (demo-out/ is made by `run`).
    let demo_out = root.join("demo-out");
    let existed = demo_out.exists();
    let demo = Config::load(&root.join("config/demo.toml")).unwrap();
    assert!(demo.bundle.join("bundle.toml").is_file(), "{}", demo.bundle.display());
    assert_eq!(demo_out.exists(), existed, "loading config/demo.toml created demo-out/");
    let s = Setup::new();
    s.frames("frames", 1, 320, 240);
    let cfg =
        s.config(&format!("kind = \"files\"\npaths = [{:?}]", s.path("frames/*.jpg").display().to_string()), "", "");
    let out = Command::new(BIN).args(["check", "--config", cfg.to_str().unwrap()]).output().unwrap();
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    let effective: Config = toml::from_str(&String::from_utf8(out.stdout).unwrap()).unwrap();
    assert_eq!(
        (effective.engine.settings.budget_ms, effective.engine.settings.max_patches, effective.log.rotate_mb),
        (100.0, 256, 64.0)
    );
    assert!(String::from_utf8_lossy(&out.stderr).contains("first frame"));
}

/// Files in `dir`, hidden ones (the claimed folder) left out.
fn visible(dir: &Path) -> Vec<String> {
    let mut v: Vec<String> = std::fs::read_dir(dir)
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .filter(|n| !n.starts_with('.'))
        .collect();
    v.sort();
    v
}

fn claimed(inbox: &Path) -> usize {
    std::fs::read_dir(inbox.join(".saccade-claimed")).map(|d| d.count()).unwrap_or(0)
}

/// How many frame or error records name each file.
fn records_per_file(records: &[Value]) -> std::collections::BTreeMap<String, usize> {
    let mut n = std::collections::BTreeMap::new();
    for r in records.iter().filter(|r| r["record"] == "frame" || r["record"] == "error") {
        let name = Path::new(r["origin"].as_str().unwrap()).file_name().unwrap().to_string_lossy().into_owned();
        *n.entry(name).or_insert(0) += 1;
    }
    n
}

fn folder_source(s: &Setup, after: &str) -> String {
    let inbox = s.path("inbox");
    std::fs::create_dir_all(&inbox).unwrap();
    format!(
        "kind = \"folder\"\npath = {:?}\nafter = \"{after}\"\nmove_to = {:?}\nstable_ms = 1\npoll_ms = 20",
        inbox.display().to_string(),
        s.path("done").display().to_string()
    )
}

#[test]
fn a_too_small_frame_is_an_error_record_and_the_daemon_goes_on() {
    let s = Setup::new();
    let source = folder_source(&s, "delete");
    let cfg = s.config(&source, "budget_ms = 50", "sync = \"never\"");
    let inbox = s.path("inbox");
    let mut child = s.spawn(&cfg, &[]);
    // Each side at or below 8 pixels made the attention network's pooling panic.
    for (name, w, h) in [("dot.png", 1, 1), ("tiny.png", 8, 8), ("strip.png", 900, 6)] {
        RgbImage::from_pixel(w, h, image::Rgb([90, 90, 90])).save(s.path(name)).unwrap();
        std::fs::rename(s.path(name), inbox.join(name)).unwrap();
    }
    for p in s.frames("staged", 2, 320, 240) {
        std::fs::rename(&p, inbox.join(p.file_name().unwrap())).unwrap();
    }
    wait_for(60, "five records", || records_per_file(&s.records()).len() == 5);
    wait_for(30, "the inbox to empty", || visible(&inbox).is_empty() && claimed(&inbox) == 0);
    assert!(stop(&mut child).success(), "{}", s.stderr());
    let recs = s.records();
    let errors = kind(&recs, "error");
    assert_eq!(errors.len(), 3, "{errors:?}");
    assert!(errors.iter().all(|e| e["error"].as_str().unwrap().contains("needs at least 25×25")), "{errors:?}");
    assert_eq!(kind(&recs, "frame").len(), 2);
    assert!(records_per_file(&recs).values().all(|&n| n == 1));
    assert!(!s.stderr().contains("panicked"), "{}", s.stderr());
}

/// Kills the daemon with SIGKILL at arbitrary points while it works through a burst of
/// files, restarting it each time: at the end every file has exactly one record.
fn kill_9_keeps_one_record_per_file(after: &str) {
    let s = Setup::new();
    let source = folder_source(&s, after);
    let cfg = s.config(&source, "budget_ms = 20\nmax_patches = 8", "sync = \"never\"");
    let inbox = s.path("inbox");
    let names: Vec<String> = s
        .frames("staged", 24, 320, 240)
        .into_iter()
        .map(|p| {
            let name = p.file_name().unwrap().to_string_lossy().into_owned();
            std::fs::rename(&p, inbox.join(&name)).unwrap();
            name
        })
        .collect();
    for round in 0..6u64 {
        let before = records_per_file(&s.records()).len();
        if before == names.len() {
            break;
        }
        let mut child = s.spawn(&cfg, &[]);
        wait_for(60, "progress", || records_per_file(&s.records()).len() > before);
        std::thread::sleep(Duration::from_millis(37 * round));
        child.kill().unwrap();
        child.wait().unwrap();
        let counts = records_per_file(&s.records());
        assert!(counts.values().all(|&n| n == 1), "round {round}: {counts:?}");
    }
    let mut child = s.spawn(&cfg, &[]);
    // Up (signal handlers in place) before the stop.
    wait_for(60, "the daemon up", || s.stderr().contains("source up"));
    wait_for(60, "every file", || visible(&inbox).is_empty() && claimed(&inbox) == 0);
    assert!(stop(&mut child).success(), "{}", s.stderr());
    let counts = records_per_file(&s.records());
    assert_eq!(counts.keys().cloned().collect::<Vec<_>>(), names, "every file recorded");
    assert!(counts.values().all(|&n| n == 1), "{counts:?}");
    match after {
        "move" => assert_eq!(visible(&s.path("done")), names),
        _ => assert!(!s.path("done").exists() || visible(&s.path("done")).is_empty()),
    }
    let v = validate(&s.log());
    assert_eq!(v["problems"], Value::Array(vec![]), "{v}");
}

#[test]
fn kill_9_under_delete_leaves_every_file_with_one_record() {
    kill_9_keeps_one_record_per_file("delete");
}

#[test]
fn kill_9_under_move_leaves_every_file_with_one_record() {
    kill_9_keeps_one_record_per_file("move");
}

#[test]
fn keep_remembers_what_was_recorded_across_restarts() {
    let s = Setup::new();
    let source = folder_source(&s, "keep");
    let cfg = s.config(&source, "budget_ms = 20", "");
    let inbox = s.path("inbox");
    for p in s.frames("staged", 3, 320, 240) {
        std::fs::rename(&p, inbox.join(p.file_name().unwrap())).unwrap();
    }
    for round in 0..2 {
        let mut child = s.spawn(&cfg, &[]);
        wait_for(60, "three records", || records_per_file(&s.records()).len() == 3);
        if round == 1 {
            // A new file is still taken after the restart.
            s.frames("later", 1, 320, 240);
            std::fs::rename(s.path("later/f000.jpg"), inbox.join("new.jpg")).unwrap();
            wait_for(60, "the new file", || records_per_file(&s.records()).len() == 4);
        }
        wait_for(30, "files put back", || visible(&inbox).len() == 3 + round && claimed(&inbox) == 1);
        assert!(stop(&mut child).success(), "{}", s.stderr());
    }
    let counts = records_per_file(&s.records());
    assert!(counts.values().all(|&n| n == 1), "{counts:?}");
}

#[test]
fn a_full_disk_keeps_whole_lines_bounds_the_backlog_and_reports_it() {
    use std::io::Read;
    use std::os::unix::process::CommandExt;
    let s = Setup::new();
    s.frames("frames", 2, 320, 240);
    let source = s.repeating("frames/*.jpg", 50.0);
    let cfg = s.config(&source, "budget_ms = 20", "health_interval_s = 0.2\nbacklog_mb = 0.004\nsync = \"always\"");
    // The log's file system is simulated full by a file size limit (RLIMIT_FSIZE); writes
    // past it fail part-way, as on a full disk. SIGXFSZ ignored, so they fail with EFBIG.
    const LIMIT: u64 = 20_000;
    let mut cmd = Command::new(BIN);
    cmd.args(["run", "--config", cfg.to_str().unwrap()]).stdout(Stdio::null()).stderr(Stdio::piped());
    unsafe {
        cmd.pre_exec(|| {
            libc::signal(libc::SIGXFSZ, libc::SIG_IGN);
            let lim = libc::rlimit { rlim_cur: LIMIT, rlim_max: libc::RLIM_INFINITY };
            if libc::setrlimit(libc::RLIMIT_FSIZE, &lim) != 0 {
                return Err(std::io::Error::last_os_error());
            }
            Ok(())
        });
    }
    let mut child = cmd.spawn().unwrap();
    let stderr = std::sync::Arc::new(std::sync::Mutex::new(String::new()));
    let mut pipe = child.stderr.take().unwrap();
    let sink = stderr.clone();
    let reader = std::thread::spawn(move || {
        let mut buf = [0u8; 4096];
        while let Ok(n) = pipe.read(&mut buf) {
            if n == 0 {
                break;
            }
            sink.lock().unwrap().push_str(&String::from_utf8_lossy(&buf[..n]));
        }
    });
    let said = |what: &str| stderr.lock().unwrap().contains(what);
    wait_for(120, "records shed", || said("records shed so far"));
    let text = std::fs::read(s.log()).unwrap();
    assert!(text.len() as u64 <= LIMIT && text.ends_with(b"\n"), "{} bytes", text.len());
    // Space again: the backlog drains and the next health record tells what was shed.
    let unlimited = libc::rlimit { rlim_cur: libc::RLIM_INFINITY, rlim_max: libc::RLIM_INFINITY };
    assert_eq!(unsafe { libc::prlimit(child.id() as i32, libc::RLIMIT_FSIZE, &unlimited, std::ptr::null_mut()) }, 0);
    wait_for(60, "a health record after the full disk", || {
        kind(&s.records(), "health").iter().any(|h| h["shed"].as_u64().unwrap_or(0) > 0)
    });
    assert!(stop(&mut child).success());
    reader.join().unwrap();
    let text = std::fs::read_to_string(s.log()).unwrap();
    assert!(text.ends_with('\n'));
    for (n, line) in text.lines().enumerate() {
        assert!(serde_json::from_str::<Value>(line).is_ok(), "line {}: {line:?}", n + 1);
    }
    let health = kind(&s.records(), "health");
    let h = health.iter().find(|h| h["shed"].as_u64().unwrap() > 0).unwrap();
    // The backlog never held more than its bound.
    assert!(h["backlog_bytes"].as_u64().unwrap() <= 4 * 1024 + 4096, "{h}");
    let v = validate(&s.log());
    assert_eq!(v["problems"], Value::Array(vec![]), "{v}");
}

/// Values that passed `check` and then panicked at start, at the first frame or in the
/// writer thread: each is refused by check and run, with the file, field and range.
#[test]
fn out_of_range_values_are_refused_by_check_run_and_reload() {
    let s = Setup::new();
    s.frames("frames", 2, 320, 240);
    let files = s.repeating("frames/*.jpg", 20.0);
    let evidence =
        |extra: &str| format!("\n[evidence]\nenabled = true\ndir = {:?}\n{extra}", s.path("ev").display().to_string());
    let cases: Vec<(String, String, String, &str)> = vec![
        (files.clone(), "budget_ms = 1e300".into(), String::new(), "budget_ms = 1e300"),
        (files.clone(), "samples = 100000000".into(), String::new(), "samples = 100000000"),
        (files.clone(), String::new(), "sync_interval_s = inf".into(), "sync_interval_s = inf"),
        (files.clone(), String::new(), "health_interval_s = 1e300".into(), "health_interval_s = 1e300"),
        (files.clone(), String::new(), "backlog_mb = -1".into(), "backlog_mb = -1"),
        (files.clone(), String::new(), evidence("max_age_hours = inf"), "max_age_hours = inf"),
        ("kind = \"scene\"\nfps = 1e-300".into(), String::new(), String::new(), "fps = 1e-300"),
    ];
    for (source, engine, log, wanted) in &cases {
        let cfg = s.config(source, engine, log);
        for cmd in ["check", "run"] {
            let out = Command::new(BIN).args([cmd, "--config", cfg.to_str().unwrap()]).output().unwrap();
            let err = String::from_utf8_lossy(&out.stderr);
            assert_eq!(out.status.code(), Some(2), "{cmd} {wanted}: {err}");
            assert!(err.contains("saccade.toml:") && err.contains(wanted) && err.contains("expected"), "{cmd}: {err}");
        }
    }
    // check refuses what run would: a mask that is not an image, a log path that is a
    // folder. [evidence] with only enabled and dir takes the other keys' defaults.
    std::fs::write(s.path("mask.png"), b"not an image").unwrap();
    let cfg = s.config(&files, "", &format!("\n[mask]\nimage = {:?}", s.path("mask.png").display().to_string()));
    let out = Command::new(BIN).args(["check", "--config", cfg.to_str().unwrap()]).output().unwrap();
    assert!(!out.status.success() && String::from_utf8_lossy(&out.stderr).contains("mask"));
    std::fs::create_dir_all(s.log()).unwrap();
    let cfg = s.config(&files, "", &evidence(""));
    let out = Command::new(BIN).args(["check", "--config", cfg.to_str().unwrap()]).output().unwrap();
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(!out.status.success() && err.contains("[log] path") && err.contains("is a folder"), "{err}");
    std::fs::remove_dir(s.log()).unwrap();
    let cfg = s.config(&files, "", &evidence(""));
    assert!(Config::load(&cfg).is_ok());

    // Sent by SIGHUP: rejected and logged, and the running configuration stays.
    let cfg = s.config(&files, "budget_ms = 40", "");
    let mut child = s.spawn(&cfg, &[]);
    wait_for(60, "records", || kind(&s.records(), "frame").len() >= 2);
    for (n, (_, engine, log, wanted)) in cases.iter().filter(|c| c.0 == files).enumerate() {
        s.config(&files, engine, log);
        signal(&child, libc::SIGHUP);
        wait_for(30, wanted, || s.stderr().matches("reload rejected").count() > n);
        assert!(s.stderr().contains(wanted), "{}", s.stderr());
    }
    let before = kind(&s.records(), "frame").len();
    wait_for(60, "records after the rejections", || kind(&s.records(), "frame").len() > before + 2);
    assert!(stop(&mut child).success(), "{}", s.stderr());
    assert!(kind(&s.records(), "frame").iter().all(|r| r["budget_ms"] == 40.0));
    assert!(!s.stderr().contains("panicked"), "{}", s.stderr());
}
