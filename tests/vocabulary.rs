//! One vocabulary for options: walks every subcommand's options through clap and fails
//! when one long name carries two meanings (different help, value name or kind) or two
//! defaults. Input: the clap command tree. Output: pass or fail. Never runs a command.

use std::collections::BTreeMap;

use clap::{Arg, ArgAction, Command, CommandFactory};

/// What an option means, as far as a reader of `--help` can tell.
#[derive(Debug, Clone, PartialEq, Eq)]
struct Meaning {
    help: String,
    short: Option<char>,
    value_name: String,
    takes_value: bool,
    defaults: Vec<String>,
}

fn meaning(a: &Arg) -> Meaning {
    Meaning {
        help: a.get_help().map(|h| h.to_string()).unwrap_or_default(),
        short: a.get_short(),
        value_name: a
            .get_value_names()
            .map(|v| v.iter().map(|s| s.to_string()).collect::<Vec<_>>().join(" "))
            .unwrap_or_default(),
        takes_value: !matches!(
            a.get_action(),
            ArgAction::SetTrue | ArgAction::SetFalse | ArgAction::Count | ArgAction::Help | ArgAction::Version | ArgAction::HelpShort | ArgAction::HelpLong
        ),
        defaults: a
            .get_default_values()
            .iter()
            .map(|v| v.to_string_lossy().into_owned())
            .collect(),
    }
}

/// Every (command path, option) pair of the tree. Two options of one command with
/// the same id (a flattened group clashing with a field) fail here, since clap only
/// notices when that command line is parsed.
fn walk(cmd: &Command, path: &str, out: &mut Vec<(String, String, Meaning)>) {
    let mut ids = std::collections::HashSet::new();
    for a in cmd.get_arguments() {
        assert!(ids.insert(a.get_id().clone()), "`{path}` has two options with id `{}`", a.get_id());
    }
    for a in cmd.get_arguments() {
        if let Some(long) = a.get_long() {
            if long != "help" && long != "version" {
                out.push((path.to_string(), long.to_string(), meaning(a)));
            }
        }
    }
    for sub in cmd.get_subcommands() {
        walk(sub, &format!("{path} {}", sub.get_name()), out);
    }
}

#[test]
fn every_option_name_has_one_meaning_and_one_default() {
    let mut all = Vec::new();
    walk(&assize::cli::Cli::command(), "assize", &mut all);
    let mut by_name: BTreeMap<String, Vec<(String, Meaning)>> = BTreeMap::new();
    for (path, long, m) in all {
        by_name.entry(long).or_default().push((path, m));
    }
    let mut problems = Vec::new();
    for (long, uses) in &by_name {
        let first = &uses[0];
        for (path, m) in &uses[1..] {
            if *m != first.1 {
                problems.push(format!(
                    "--{long}: `{}` says {:?}\n          `{path}` says {:?}",
                    first.0, first.1, m
                ));
            }
        }
    }
    let mut letters: BTreeMap<char, String> = BTreeMap::new();
    for (long, uses) in &by_name {
        for (path, m) in uses {
            if let Some(c) = m.short {
                if let Some(other) = letters.insert(c, long.clone()) {
                    if other != *long {
                        problems.push(format!("-{c} stands for --{other} and for --{long} (`{path}`)"));
                    }
                }
            }
        }
    }
    assert!(problems.is_empty(), "{} option(s) differ:\n{}", problems.len(), problems.join("\n"));
}

/// The README's table of shared options lists every option that two or more
/// subcommands take, and nothing else. `injection` takes every `grade` option (it
/// grades twice), so it does not make a `grade` option shared by itself.
#[test]
fn readme_lists_every_shared_option() {
    let mut all = Vec::new();
    walk(&assize::cli::Cli::command(), "assize", &mut all);
    let mut commands: BTreeMap<String, Vec<String>> = BTreeMap::new();
    for (path, long, _) in all.into_iter().filter(|(p, _, _)| p != "assize injection") {
        commands.entry(long).or_default().push(path);
    }
    let shared: Vec<&String> = commands
        .iter()
        .filter(|(_, paths)| paths.len() > 1)
        .map(|(long, _)| long)
        .collect();
    let readme = std::fs::read_to_string(concat!(env!("CARGO_MANIFEST_DIR"), "/README.md"))
        .expect("README.md");
    let table: Vec<&str> = readme
        .lines()
        .skip_while(|l| !l.starts_with("### Shared options"))
        .skip(1)
        .take_while(|l| !l.starts_with('#'))
        .filter_map(|l| l.strip_prefix("| `--"))
        .filter_map(|l| l.split(['`', ' ']).next())
        .collect();
    let missing: Vec<&&String> = shared.iter().filter(|s| !table.contains(&s.as_str())).collect();
    let extra: Vec<&&str> = table
        .iter()
        .filter(|t| !shared.iter().any(|s| s.as_str() == **t))
        .collect();
    assert!(
        missing.is_empty() && extra.is_empty(),
        "README `### Shared options` table: missing {missing:?}, not shared {extra:?}"
    );
}
