//! The quick grade end to end on the simulated bench: a family of 40
//! packs of one build (10S 14 Ah Li-ion) with a spread of ageing —
//! capacity fade and resistance growth correlated but not identical —
//! calibrated on 30 (a screening run and a full capacity test each) and
//! the other 10 predicted from their screening run alone, each checked
//! against its own full capacity test.

use crate::util::*;
use std::path::{Path, PathBuf};
use std::time::Instant;

/// A small deterministic generator for the family's spread.
struct Lcg(u64);

impl Lcg {
    fn next(&mut self) -> f64 {
        self.0 = self
            .0
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        (self.0 >> 11) as f64 / (1u64 << 53) as f64
    }
}

/// Run a procedure for a pack on the simulated bench with its ageing;
/// the run folder.
fn run(dir: &Path, results: &Path, pack: &str, procedure: &str, cfg: &str) -> PathBuf {
    let cfg_path = write(dir, &format!("{pack}-{}.toml", procedure.len()), cfg);
    let out = packbench(&[
        "run",
        procedure,
        "--sim",
        "--sim-config",
        cfg_path.to_str().unwrap(),
        "--pack",
        pack,
        "--results",
        results.to_str().unwrap(),
        "--quiet",
    ]);
    assert!(out.status.success(), "{pack}: {}", text(&out.stderr));
    let mut runs: Vec<PathBuf> = std::fs::read_dir(results.join(pack))
        .unwrap()
        .filter_map(|e| e.ok().map(|e| e.path()))
        .filter(|p| p.is_dir())
        .collect();
    runs.sort();
    runs.into_iter()
        .find(|p| {
            p.to_string_lossy().ends_with(
                procedure
                    .trim_start_matches("procedures/")
                    .trim_end_matches(".toml"),
            )
        })
        .unwrap()
}

/// One pack of the family: (capacity factor, resistance factor, the
/// state of charge it comes in at).
fn family(n: usize) -> Vec<(f64, f64, f64)> {
    let mut rng = Lcg(0x0fe1_10e5);
    (0..n)
        .map(|_| {
            let cap = 0.70 + 0.30 * rng.next();
            let res = 1.0 + 2.5 * (1.0 - cap) + 0.4 * (rng.next() - 0.5);
            let soc = 0.80 + 0.10 * rng.next();
            (cap, res, soc)
        })
        .collect()
}

fn cfg(k: usize, (cap, res, soc): (f64, f64, f64), screening: bool) -> String {
    let soc = if screening { soc } else { 0.5 };
    format!(
        "seed = {}\n[pack]\ncapacity_factor = {cap}\nresistance_factor = {res}\ninitial_soc = {soc}\n",
        k + 1 + if screening { 0 } else { 1000 }
    )
}

#[test]
fn a_family_of_40_is_graded_from_screening_runs_within_its_intervals() {
    let t0 = Instant::now();
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let shop = d.join("results");
    let checks = d.join("full-tests-of-the-new-packs");
    let packs = family(40);
    let mut screens = Vec::new();
    for (k, p) in packs.iter().enumerate() {
        let id = format!("FR-Q{k:02}");
        let s = run(
            d,
            &shop,
            &id,
            "procedures/screen-li-ion.toml",
            &cfg(k, *p, true),
        );
        // The screening run stays under an hour of bench time.
        let sum = json(&s.join("summary.json"));
        assert!(sum["duration_s"].as_f64().unwrap() < 3600.0, "{id}");
        // A charge stopped by its 30 min cap is warned of in the run's own
        // summary (as `check` warns of it), and only then.
        let capped = sum["steps"][0]["end_kind"] == "time";
        let warned = sum["warnings"].as_array().unwrap().iter().any(|w| {
            w.as_str()
                .unwrap()
                .starts_with("step 1: the charge stopped on its time cap")
        });
        assert_eq!(capped, warned, "{id}: {}", sum["warnings"]);
        // The first 30 calibrate; the other 10 get their full test in a
        // folder the quick grade does not read.
        let full_in = if k < 30 { &shop } else { &checks };
        let f = run(
            d,
            full_in,
            &id,
            "procedures/capacity-check.toml",
            &cfg(k, *p, false),
        );
        screens.push((id, s, f));
    }
    let (mut abs_err, mut inside, mut graded) = (0.0, 0, 0);
    let rated = 14.0;
    for (id, s, f) in &screens[30..] {
        let out = packbench(&["grade-quick", s.to_str().unwrap(), "--json"]);
        assert!(out.status.success(), "{id}: {}", text(&out.stderr));
        let q: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
        assert_eq!(q["estimate"], true);
        assert_eq!(q["calibration"]["pairs"], 30, "{id}");
        let p = &q["prediction"];
        let (y, lo, hi) = (
            p["capacity_ah"].as_f64().unwrap(),
            p["lower_ah"].as_f64().unwrap(),
            p["upper_ah"].as_f64().unwrap(),
        );
        let measured = json(&f.join("summary.json"))["capacity"]["measured_ah"]
            .as_f64()
            .unwrap();
        abs_err += (y - measured).abs();
        inside += usize::from(lo <= measured && measured <= hi);
        graded += usize::from(q["grade"].is_string());
        // Honesty: the estimate is written beside the run, never into
        // its measured figures.
        assert!(s.join("quick-grade.json").is_file());
        assert!(json(&s.join("summary.json"))["capacity"].is_null());
        eprintln!(
            "{id}: estimate {y:.3} Ah [{lo:.3}, {hi:.3}], full test {measured:.3} Ah, {}",
            q["verdict"]
        );
    }
    let mae_pct = abs_err / 10.0 / rated * 100.0;
    let coverage = inside as f64 / 10.0;
    eprintln!(
        "quick grade, 30 calibrating / 10 predicted: mean absolute error {mae_pct:.3} % of rated, {inside}/10 inside their 95 % interval, {graded}/10 graded with confidence; the whole loop {:.1} s",
        t0.elapsed().as_secs_f64()
    );
    assert!(mae_pct < 3.0, "mean absolute error {mae_pct:.2} % of rated");
    // The intervals mean what they say: at least 9 of 10 inside (a
    // collapse of the coverage fails here).
    assert!(coverage >= 0.9, "only {inside}/10 inside their intervals");

    // Refusals. A family of five pairs: no estimate, and how many more
    // full tests it needs.
    let small = d.join("small-shop");
    for (id, s, f) in screens.iter().take(5).chain(std::iter::once(&screens[35])) {
        for r in [s, f].into_iter().filter(|r| r.starts_with(&shop)) {
            let to = small.join(id).join(r.file_name().unwrap());
            copy_dir(r, &to);
            std::fs::copy(
                shop.join(id).join("pack.toml"),
                small.join(id).join("pack.toml"),
            )
            .unwrap();
        }
    }
    let s35 = small
        .join("FR-Q35")
        .join(screens[35].1.file_name().unwrap());
    let out = packbench(&["grade-quick", s35.to_str().unwrap()]);
    // A family too small to estimate from: bad input, exit 2 (README).
    assert_eq!(out.status.code(), Some(2), "{}", text(&out.stdout));
    let said = text(&out.stdout);
    assert!(
        said.contains("5 calibration pair(s)") && said.contains("5 more full test(s)"),
        "{said}"
    );
    // An interval too wide for the shop's policy: grades every 1 % of
    // state of health, so no interval of this family fits one grade.
    let mut policy = String::from("name = \"fine\"\n");
    for g in (60..=100).rev() {
        policy.push_str(&format!(
            "[[grade]]\nlabel = \"S{g}\"\nmeaning = \"at least {g} %\"\nsoh_min = \"{g}%\"\n"
        ));
    }
    policy.push_str("[[grade]]\nlabel = \"X\"\nmeaning = \"below\"\n");
    let policy = write(d, "fine.toml", &policy);
    let s = &screens[35].1;
    let out = packbench(&[
        "grade-quick",
        s.to_str().unwrap(),
        "--policy",
        policy.to_str().unwrap(),
        "--json",
    ]);
    let q: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    assert!(q["grade"].is_null(), "{q}");
    assert!(
        q["verdict"]
            .as_str()
            .unwrap()
            .contains("a full capacity test is needed"),
        "{q}"
    );
    // A run that is not a screening run is refused as bad input.
    let out = packbench(&["grade-quick", screens[0].2.to_str().unwrap()]);
    assert_eq!(out.status.code(), Some(2));
    assert!(text(&out.stderr).contains("not a screening run"));
}

fn copy_dir(from: &Path, to: &Path) {
    std::fs::create_dir_all(to).unwrap();
    for e in std::fs::read_dir(from).unwrap() {
        let e = e.unwrap();
        std::fs::copy(e.path(), to.join(e.file_name())).unwrap();
    }
}
