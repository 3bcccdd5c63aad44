//! What a mature command line has (issue 12 item 6): examples in every leaf command's help
//! that survive an 80-column render, completions and a manual page generated from the clap
//! definitions, `--quiet`, and `store status` naming the trust-set version. The commands
//! are found from the clap definitions themselves, so a new command is checked too.

mod common;

use std::process::{Command, Stdio};

use ampoule::cli::Cli;
use clap::{CommandFactory, Parser};
use common::*;
use serde_json::Value;

/// Every command path without subcommands of its own, like ["trust", "init"].
fn leaves() -> Vec<Vec<String>> {
    fn walk(cmd: &clap::Command, path: &mut Vec<String>, out: &mut Vec<Vec<String>>) {
        if cmd.has_subcommands() {
            for sub in cmd.get_subcommands() {
                path.push(sub.get_name().to_string());
                walk(sub, path, out);
                path.pop();
            }
        } else {
            out.push(path.clone());
        }
    }
    let mut out = Vec::new();
    walk(&Cli::command(), &mut Vec::new(), &mut out);
    out
}

/// `ampoule ARGS` with no terminal anywhere and COLUMNS=80, as help renders in a script.
fn run_80(args: &[String]) -> (i32, String) {
    let out = Command::new(env!("CARGO_BIN_EXE_ampoule"))
        .args(args)
        .env("COLUMNS", "80")
        .stdin(Stdio::null())
        .output()
        .expect("the ampoule binary runs");
    (
        out.status.code().expect("exited"),
        String::from_utf8(out.stdout).expect("UTF-8"),
    )
}

/// Splits a command line into words as a POSIX shell would, for the subset examples use:
/// single and double quotes, a `#` comment, and nothing after a `>` or `|`.
fn shell_words(line: &str) -> Vec<String> {
    let mut words = Vec::new();
    let mut word: Option<String> = None;
    let mut chars = line.chars();
    while let Some(c) = chars.next() {
        match c {
            '\'' | '"' => {
                let w = word.get_or_insert_with(String::new);
                for q in chars.by_ref() {
                    if q == c {
                        break;
                    }
                    w.push(q);
                }
            }
            ' ' => words.extend(word.take()),
            '#' if word.is_none() => break,
            '>' | '|' if word.is_none() => break,
            _ => word.get_or_insert_with(String::new).push(c),
        }
    }
    words.extend(word);
    words
}

/// The commands under "Example:" or "Examples:" in a help text, each with its lines.
fn examples(help: &str) -> Vec<Vec<&str>> {
    let mut lines = help
        .lines()
        .skip_while(|l| *l != "Examples:" && *l != "Example:")
        .skip(1)
        .take_while(|l| !l.is_empty());
    let mut commands = Vec::new();
    while let Some(first) = lines.next() {
        let mut command = vec![first];
        while command.last().is_some_and(|l| l.ends_with(" \\")) {
            match lines.next() {
                Some(next) => command.push(next),
                None => break,
            }
        }
        commands.push(command);
    }
    commands
}

#[test]
fn issue12_every_leaf_command_has_help_examples_that_are_whole_commands_at_80_columns() {
    let leaves = leaves();
    assert!(leaves.len() >= 25, "found only {leaves:?}");
    for path in leaves {
        let mut args = path.clone();
        args.push("--help".into());
        let (code, help) = run_80(&args);
        assert_eq!(code, 0, "ampoule {args:?}");
        let commands = examples(&help);
        assert!(
            !commands.is_empty(),
            "ampoule {} --help has no examples:\n{help}",
            path.join(" ")
        );
        for lines in commands {
            let shown = lines.join("\n");
            for (i, line) in lines.iter().enumerate() {
                // A line clap wrapped would be neither a command nor end in " \".
                assert!(
                    line.chars().count() <= 80 && line.starts_with("  "),
                    "ampoule {} --help: {line:?}",
                    path.join(" ")
                );
                if i > 0 {
                    assert!(line.starts_with("      "), "not indented: {line:?}");
                }
            }
            let joined: String = lines
                .iter()
                .map(|l| l.trim().trim_end_matches('\\').trim())
                .collect::<Vec<_>>()
                .join(" ");
            if joined.starts_with('#') {
                continue;
            }
            let words: Vec<String> = shell_words(&joined)
                .into_iter()
                .skip_while(|w| w.contains('=') && !w.starts_with('-'))
                .collect();
            match words.first().map(String::as_str) {
                Some("ampoule") => {
                    if let Err(e) = Cli::try_parse_from(&words) {
                        panic!(
                            "ampoule {} --help shows an example that does not parse:\n{shown}\n{e}",
                            path.join(" ")
                        );
                    }
                }
                Some("openssl") => {}
                _ => panic!(
                    "ampoule {} --help: not a whole command:\n{shown}",
                    path.join(" ")
                ),
            }
        }
    }
}

#[test]
fn issue12_the_example_check_catches_a_wrapped_or_broken_example() {
    // The checks above must be able to fail: a clap-wrapped line is no command, and a
    // command that does not parse is caught.
    let help =
        "Examples:\n  ampoule verify b.ampoule --trust release.public.pem\n  --app-version 2.3.0\n";
    let commands = examples(help);
    assert_eq!(commands.len(), 2);
    let words = shell_words(commands[1][0].trim());
    assert_ne!(words[0], "ampoule");
    assert!(Cli::try_parse_from(shell_words("ampoule pack ... # comment")).is_err());
    assert_eq!(
        shell_words("AMPOULE_PASS=x ampoule keygen --requires-app '>=2.0.0, <3.0.0' > out # c"),
        [
            "AMPOULE_PASS=x",
            "ampoule",
            "keygen",
            "--requires-app",
            ">=2.0.0, <3.0.0"
        ]
    );
}

#[test]
fn issue12_completions_and_the_manual_page_name_every_subcommand() {
    let leaves = leaves();
    for shell in ["bash", "zsh", "fish", "elvish", "powershell"] {
        let (code, script) = run_80(&["completions".into(), shell.into()]);
        assert_eq!(code, 0, "completions {shell}");
        for path in &leaves {
            let name = path.last().expect("a name");
            assert!(
                script.contains(name.as_str()),
                "{shell} completions lack {name}"
            );
        }
    }
    let (code, page) = run_80(&["man".into()]);
    assert_eq!(code, 0);
    assert!(page.contains(".TH ampoule 1"), "{page}");
    for path in &leaves {
        for depth in 1..=path.len() {
            let heading = format!(".SH \"AMPOULE {}\"", path[..depth].join(" ").to_uppercase());
            assert!(page.contains(&heading), "the manual page lacks {heading}");
        }
    }
    // Each command's examples are in its section.
    assert!(
        page.contains("ampoule key\\-id release.public.pem release.secret.pem"),
        "the manual page lacks key-id's examples"
    );
}

#[test]
fn issue12_quiet_prints_nothing_on_success_but_errors_and_json_stay() {
    let env = Env::new();
    env.pack("1.0.0", "b.ampoule");
    for args in [
        &["--quiet", "verify", "b.ampoule", "--trust", PUBLIC][..],
        &["inspect", "b.ampoule", "-q"][..],
        &["-q", "keygen", "--secret", "k.pem", "--public", "k.pub"][..],
    ] {
        let run = env.run(args);
        assert_eq!(
            (run.code, run.stdout.as_str(), run.stderr.as_str()),
            (0, "", ""),
            "ampoule {args:?}"
        );
    }
    let run = env.run(["--quiet", "verify", "missing.ampoule", "--trust", PUBLIC]);
    assert_eq!(
        (run.code, run.stdout.as_str(), run.stderr.as_str()),
        (
            2,
            "",
            "ampoule: error: cannot open bundle missing.ampoule: No such file or directory (os \
             error 2)\n"
        )
    );
    let loud = env.run(["--json", "inspect", "b.ampoule", "--trust", PUBLIC]);
    let quiet = env.run([
        "--json",
        "--quiet",
        "inspect",
        "b.ampoule",
        "--trust",
        PUBLIC,
    ]);
    assert_eq!((quiet.code, &quiet.stdout), (0, &loud.stdout));
    assert!(serde_json::from_str::<Value>(&quiet.stdout).is_ok());
}

#[test]
fn issue12_store_status_names_the_trust_set_version() {
    let env = Env::new();
    env.pack("1.0.0", "b.ampoule");
    let ok = |args: &[&str]| {
        let run = env.run(args);
        assert_eq!(run.code, 0, "ampoule {args:?}: {run:?}");
        run
    };
    ok(&["trust", "init", "--key", PUBLIC, "-o", "trust-1.json"]);
    ok(&["trust", "sign", "trust-1.json", "--key", SECRET]);
    ok(&[
        "publish",
        "--trust-set",
        "trust-1.json",
        "--tree",
        "release",
        "--key",
        SECRET,
    ]);
    ok(&[
        "publish",
        "b.ampoule",
        "--tree",
        "release",
        "--channel",
        "stable",
        "--key",
        SECRET,
    ]);
    ok(&[
        "offline",
        "--tree",
        "release",
        "--channel",
        "stable",
        "-o",
        "stable.ampoule-offline",
    ]);
    ok(&[
        "update",
        "--store",
        "camera",
        "--offline",
        "stable.ampoule-offline",
        "--trust-set",
        "trust-1.json",
        "--app-version",
        APP_VERSION,
    ]);
    let status = |trust: &[&str], json: bool| {
        let mut args = vec!["store", "status", "--store", "camera"];
        args.extend_from_slice(trust);
        args.extend_from_slice(&["--app-version", APP_VERSION]);
        if json {
            args.insert(0, "--json");
        }
        ok(&args).stdout
    };
    let text = status(&["--trust-set", "trust-1.json"], false);
    assert!(
        text.contains(
            "\ntrust    trust set version 1 (the newer of --trust-set and the one the store \
             accepted)\n"
        ),
        "{text}"
    );
    let doc: Value =
        serde_json::from_str(&status(&["--trust-set", "trust-1.json"], true)).expect("JSON");
    assert_eq!(doc["trust_set_version"], 1);
    let text = status(&["--trust", PUBLIC], false);
    assert!(
        text.contains("\ntrust    no trust set: the keys given with --trust\n"),
        "{text}"
    );
    let doc: Value = serde_json::from_str(&status(&["--trust", PUBLIC], true)).expect("JSON");
    assert_eq!(doc["trust_set_version"], Value::Null);
}
