//! Every fuzz target's property on its seeds (`fuzz/seeds/T/`) and on
//! every input that once made it fail (`fuzz/regressions/T/`), on every
//! `cargo test`: the same functions the fuzz targets call.

use packbench::fuzz_checks::TARGETS;
use std::path::Path;

fn inputs(dir: &Path) -> Vec<std::path::PathBuf> {
    let mut out: Vec<_> = std::fs::read_dir(dir)
        .map(|it| it.filter_map(|e| e.ok().map(|e| e.path())).collect())
        .unwrap_or_default();
    out.sort();
    out
}

#[test]
fn every_seed_and_regression_holds_its_property() {
    let mut total = 0;
    for (name, check) in TARGETS {
        let seeds = inputs(&Path::new("fuzz/seeds").join(name));
        assert!(seeds.len() >= 5, "{name}: a seed corpus of a few inputs");
        let regressions = inputs(&Path::new("fuzz/regressions").join(name));
        for input in seeds.iter().chain(&regressions) {
            let data = std::fs::read(input).unwrap();
            let r = std::panic::catch_unwind(|| check(&data));
            assert!(r.is_ok(), "{name}: {} fails its property", input.display());
            total += 1;
        }
    }
    // Every target's folder is one the fuzz crate builds.
    let targets = std::fs::read_to_string("fuzz/Cargo.toml").unwrap();
    for (name, _) in TARGETS {
        assert!(targets.contains(&format!("name = \"{name}\"")), "{name}");
    }
    eprintln!("{total} fuzz inputs replayed");
}
