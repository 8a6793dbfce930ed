//! The command line as a newcomer meets it: a help line for every command and option,
//! and a quiet end when the reader of the output goes away.

use std::io::{BufRead, BufReader};
use std::process::{Command, Stdio};

const BIN: &str = env!("CARGO_BIN_EXE_saccade");

fn help(args: &[&str]) -> String {
    let out = Command::new(BIN).args(args).arg("--help").output().unwrap();
    assert!(out.status.success(), "{args:?} --help: {}", String::from_utf8_lossy(&out.stderr));
    String::from_utf8(out.stdout).unwrap()
}

/// The entries of one section of clap's help (`Commands:`, `Options:`), each as its
/// name column and its description. clap puts a long description on the lines under
/// the name instead of beside it.
fn section(text: &str, name: &str) -> Vec<(String, String)> {
    let mut entries: Vec<(String, String)> = Vec::new();
    for line in text.lines().skip_while(|l| *l != name).skip(1).take_while(|l| !l.is_empty()) {
        let t = line.trim();
        let starts_entry = if name == "Options:" { t.starts_with('-') } else { line.len() - t.len() <= 2 };
        if starts_entry {
            // The name column ends at the first run of two spaces.
            let (head, rest) = t.split_once("  ").unwrap_or((t, ""));
            entries.push((head.to_string(), rest.trim().to_string()));
        } else if let Some(last) = entries.last_mut() {
            last.1 = format!("{} {t}", last.1).trim().to_string();
        }
    }
    entries
}

/// What a description says once the defaults and possible values are removed.
fn said(description: &str) -> &str {
    let end = ["[default:", "[possible values:"].iter().filter_map(|m| description.find(m)).min();
    description[..end.unwrap_or(description.len())].trim()
}

#[test]
fn every_command_and_option_has_a_help_line() {
    let top = help(&[]);
    let commands = section(&top, "Commands:");
    let names: Vec<&str> = commands.iter().map(|(n, _)| n.as_str()).collect();
    assert!(names.contains(&"run") && names.contains(&"check") && names.contains(&"demo"), "{top}");
    for (cmd, description) in &commands {
        assert!(!said(description).is_empty(), "command without a description: {cmd}");
    }
    for cmd in names.iter().filter(|c| **c != "help") {
        let text = help(&[cmd]);
        let options = section(&text, "Options:");
        assert!(options.len() >= 2, "saccade {cmd}: {text}");
        for (option, description) in &options {
            assert!(!said(description).is_empty(), "saccade {cmd}: {option} has no description");
        }
    }
}

#[test]
fn a_closed_pipe_ends_the_demo_quietly() {
    let out = tempfile::tempdir().unwrap();
    let mut child = Command::new(BIN)
        .args(["demo", "--designed", "--frames", "12", "--size", "320x240", "--out"])
        .arg(out.path())
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    // Read the first report, then go away as `head -1` does.
    let mut first = String::new();
    BufReader::new(child.stdout.take().unwrap()).read_line(&mut first).unwrap();
    assert!(first.starts_with('{'), "{first:?}");
    let out = child.wait_with_output().unwrap();
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(!stderr.contains("Broken pipe") && !stderr.contains("panicked"), "{stderr}");
    // Either it finished before noticing, or SIGPIPE ended it: no error status of its own.
    use std::os::unix::process::ExitStatusExt;
    assert!(out.status.success() || out.status.signal() == Some(libc::SIGPIPE), "{:?}: {stderr}", out.status);
}
