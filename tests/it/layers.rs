//! The layering rules the compiler cannot see on its own.
//!
//! Between crates, Cargo refuses a dependency loop, so the crates' own
//! manifests are the rule: each crate may depend only on the workspace
//! crates listed here, and none below the binary on clap. Inside a crate,
//! Rust allows modules to use each other in a circle; this test reads every
//! source file, collects the modules each one names (`crate::a::b`,
//! `super::x`, and the braces of a `use`), and fails on any loop.

use std::collections::{BTreeMap, BTreeSet};
use std::path::{Path, PathBuf};

/// Each workspace crate and the workspace crates it may depend on.
const ALLOWED: &[(&str, &[&str])] = &[
    ("model", &[]),
    ("instrument", &["model"]),
    ("analysis", &["model"]),
    ("record", &["model", "analysis"]),
    ("engine", &["model", "instrument", "analysis", "record"]),
    ("sim", &["model", "instrument", "engine", "record"]),
    ("report", &["model", "analysis", "record"]),
    ("exchange", &["model", "analysis", "record"]),
];

/// The `[dependencies]` keys of a manifest (normal dependencies only).
fn dependencies(manifest: &Path) -> BTreeSet<String> {
    let text = std::fs::read_to_string(manifest).unwrap();
    let doc: toml::Table = toml::from_str(&text).unwrap();
    let mut out = BTreeSet::new();
    if let Some(t) = doc.get("dependencies").and_then(|d| d.as_table()) {
        out.extend(t.keys().cloned());
    }
    if let Some(targets) = doc.get("target").and_then(|d| d.as_table()) {
        for t in targets.values() {
            if let Some(d) = t.get("dependencies").and_then(|d| d.as_table()) {
                out.extend(d.keys().cloned());
            }
        }
    }
    out
}

#[test]
fn each_crate_depends_only_on_the_layers_below_it() {
    let names: BTreeSet<&str> = ALLOWED.iter().map(|(n, _)| *n).collect();
    for (krate, allowed) in ALLOWED {
        let deps = dependencies(&Path::new("crates").join(krate).join("Cargo.toml"));
        for d in &deps {
            if names.contains(d.as_str()) {
                assert!(
                    allowed.contains(&d.as_str()),
                    "crate {krate} must not depend on {d}"
                );
            }
        }
        for banned in ["clap", "indicatif", "anyhow"] {
            assert!(
                !deps.contains(banned),
                "crate {krate} must not depend on {banned} (the binary's own)"
            );
        }
    }
    // The rule the developers' map states first.
    let engine = dependencies(Path::new("crates/engine/Cargo.toml"));
    assert!(
        !engine.contains("sim"),
        "the engine never uses the simulator"
    );
    // Every crate under crates/ is in the table.
    let mut on_disk: Vec<String> = std::fs::read_dir("crates")
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .collect();
    on_disk.sort();
    let listed: Vec<String> = names.iter().map(|s| s.to_string()).collect();
    assert_eq!(on_disk, listed, "add the new crate to ALLOWED");
}

/// Every `.rs` file under `src`, with its module path (`a::b`; the crate
/// root is the empty path).
fn modules(src: &Path) -> BTreeMap<Vec<String>, PathBuf> {
    fn walk(dir: &Path, prefix: &[String], out: &mut BTreeMap<Vec<String>, PathBuf>) {
        for e in std::fs::read_dir(dir).unwrap() {
            let p = e.unwrap().path();
            let stem = p.file_stem().unwrap().to_string_lossy().into_owned();
            if p.is_dir() {
                let mut pre = prefix.to_vec();
                pre.push(stem);
                walk(&p, &pre, out);
            } else if p.extension().is_some_and(|x| x == "rs") {
                let mut m = prefix.to_vec();
                if !matches!(stem.as_str(), "mod" | "lib" | "main") {
                    m.push(stem);
                }
                out.insert(m, p);
            }
        }
    }
    let mut out = BTreeMap::new();
    walk(src, &[], &mut out);
    out
}

/// Paths a source names, as segments after `crate::` or resolved from
/// `super::` (relative to the file's module `here`).
fn named_paths(text: &str, here: &[String]) -> Vec<Vec<String>> {
    let mut out = Vec::new();
    // Only code: comments left out, and the unit tests at the end of a
    // file (an inline `mod tests`, whose `super` is the file itself).
    let code: String = text
        .lines()
        .take_while(|l| !l.starts_with("#[cfg(test)]"))
        .map(|l| match l.find("//") {
            Some(i) => &l[..i],
            None => l,
        })
        .collect::<Vec<_>>()
        .join("\n");
    let bytes = code.as_bytes();
    let is_ident = |c: u8| c.is_ascii_alphanumeric() || c == b'_';
    let mut i = 0;
    while i < bytes.len() {
        let rest = &bytes[i..];
        let (base, skip): (Vec<String>, usize) = if rest.starts_with(b"crate::") {
            (Vec::new(), 7)
        } else if rest.starts_with(b"super::") {
            let mut base = here.to_vec();
            let mut k = 0;
            while bytes[i + k..].starts_with(b"super::") {
                base.pop();
                k += 7;
            }
            (base, k)
        } else {
            i += 1;
            continue;
        };
        if i > 0 && (is_ident(bytes[i - 1]) || bytes[i - 1] == b':') {
            i += skip;
            continue;
        }
        i += skip;
        // A braced group: each member is a path from the base.
        if bytes.get(i) == Some(&b'{') {
            let end = code[i..].find('}').map(|e| i + e).unwrap_or(bytes.len());
            for member in code[i + 1..end].split(',') {
                let segs: Vec<String> = member
                    .trim()
                    .split("::")
                    .map(|s| s.split_whitespace().next().unwrap_or("").to_string())
                    .filter(|s| !s.is_empty() && s != "self")
                    .collect();
                let mut p = base.clone();
                p.extend(segs);
                out.push(p);
            }
            i = end;
            continue;
        }
        let mut p = base;
        let mut j = i;
        loop {
            let start = j;
            while j < bytes.len() && is_ident(bytes[j]) {
                j += 1;
            }
            if j > start {
                p.push(code[start..j].to_string());
            }
            if bytes[j..].starts_with(b"::") && bytes.get(j + 2).is_some_and(|c| is_ident(*c)) {
                j += 2;
            } else {
                break;
            }
        }
        out.push(p);
        i = j;
    }
    out
}

/// The import graph of one crate: module → modules it names.
fn graph(src: &Path) -> BTreeMap<Vec<String>, BTreeSet<Vec<String>>> {
    let mods = modules(src);
    let mut g = BTreeMap::new();
    for (m, file) in &mods {
        let text = std::fs::read_to_string(file).unwrap();
        let mut deps = BTreeSet::new();
        for path in named_paths(&text, m) {
            // The longest prefix that is a module of this crate.
            let target = (0..=path.len())
                .rev()
                .map(|n| path[..n].to_vec())
                .find(|p| mods.contains_key(p));
            if let Some(t) = target {
                // A module naming its own descendants (`pub mod`, a
                // re-export) or itself is not a loop by itself; naming an
                // ancestor's items is a dependency on that ancestor.
                if t != *m {
                    deps.insert(t);
                }
            }
        }
        g.insert(m.clone(), deps);
    }
    g
}

/// A loop in the graph, if any (depth-first search).
fn find_loop(g: &BTreeMap<Vec<String>, BTreeSet<Vec<String>>>) -> Option<Vec<Vec<String>>> {
    fn visit(
        n: &Vec<String>,
        g: &BTreeMap<Vec<String>, BTreeSet<Vec<String>>>,
        state: &mut BTreeMap<Vec<String>, u8>,
        stack: &mut Vec<Vec<String>>,
    ) -> Option<Vec<Vec<String>>> {
        match state.get(n) {
            Some(2) => return None,
            Some(1) => {
                let at = stack.iter().position(|x| x == n).unwrap_or(0);
                let mut cycle = stack[at..].to_vec();
                cycle.push(n.clone());
                return Some(cycle);
            }
            _ => {}
        }
        state.insert(n.clone(), 1);
        stack.push(n.clone());
        for d in g.get(n).into_iter().flatten() {
            if let Some(c) = visit(d, g, state, stack) {
                return Some(c);
            }
        }
        stack.pop();
        state.insert(n.clone(), 2);
        None
    }
    let mut state = BTreeMap::new();
    for n in g.keys() {
        if let Some(c) = visit(n, g, &mut state, &mut Vec::new()) {
            return Some(c);
        }
    }
    None
}

fn show(cycle: &[Vec<String>]) -> String {
    cycle
        .iter()
        .map(|m| {
            if m.is_empty() {
                "crate".to_string()
            } else {
                m.join("::")
            }
        })
        .collect::<Vec<_>>()
        .join(" -> ")
}

#[test]
fn no_module_of_any_crate_imports_in_a_loop() {
    let mut roots = vec![PathBuf::from("src")];
    for e in std::fs::read_dir("crates").unwrap() {
        roots.push(e.unwrap().path().join("src"));
    }
    for src in roots {
        let g = graph(&src);
        assert!(g.len() > 1, "{}: no modules found", src.display());
        if let Some(c) = find_loop(&g) {
            panic!("{}: import loop {}", src.display(), show(&c));
        }
    }
}

/// The checker itself finds a loop it is shown, and the paths it reads.
#[test]
fn the_loop_checker_sees_a_planted_loop() {
    let here = vec!["a".to_string()];
    let paths = named_paths(
        "use crate::b::X;\nuse super::{c::Y, d};\nfn f() { crate::e::f(); } // crate::z",
        &here,
    );
    let want: Vec<Vec<String>> = vec![
        vec!["b".into(), "X".into()],
        vec!["c".into(), "Y".into()],
        vec!["d".into()],
        vec!["e".into(), "f".into()],
    ];
    assert_eq!(paths, want);
    let mut g = BTreeMap::new();
    let m = |s: &str| vec![s.to_string()];
    g.insert(m("a"), BTreeSet::from([m("b")]));
    g.insert(m("b"), BTreeSet::from([m("c")]));
    g.insert(m("c"), BTreeSet::from([m("a")]));
    let c = find_loop(&g).expect("a loop");
    assert_eq!(show(&c), "a -> b -> c -> a");
    g.insert(m("c"), BTreeSet::new());
    assert!(find_loop(&g).is_none());
}
