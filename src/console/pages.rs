//! The pages: the bays page and its script and style (embedded in the
//! binary), the packs page, and the reports, grade card and pack label
//! rendered from the results.

use super::security::refused_names;
use super::Console;
use axum::extract::{Path, State};
use axum::http::{header, StatusCode};
use axum::response::{Html, IntoResponse, Response};
use std::sync::Arc;

const BAYS_HTML: &str = include_str!("assets/bays.html");
const PACKS_HTML: &str = include_str!("assets/packs.html");
const STYLE_CSS: &str = include_str!("assets/style.css");
const CONSOLE_JS: &str = include_str!("assets/console.js");

pub async fn bays() -> Html<&'static str> {
    Html(BAYS_HTML)
}

pub async fn packs() -> Html<&'static str> {
    Html(PACKS_HTML)
}

pub async fn style() -> Response {
    (
        [(header::CONTENT_TYPE, "text/css; charset=utf-8")],
        STYLE_CSS,
    )
        .into_response()
}

pub async fn script() -> Response {
    (
        [(header::CONTENT_TYPE, "text/javascript; charset=utf-8")],
        CONSOLE_JS,
    )
        .into_response()
}

pub async fn not_found() -> Response {
    (
        StatusCode::NOT_FOUND,
        Html("<!doctype html><title>Not found</title><p>Not found. <a href=\"/\">Bays</a>"),
    )
        .into_response()
}

/// Every page's header: the console's name, its two lists, and where the
/// page is below them (`crumbs`: link and text, the last the page
/// itself). Reports written for the disk get it when the console serves
/// them.
pub fn nav(crumbs: &[(String, String)]) -> String {
    let esc = report::markup::escape;
    let mut trail = String::new();
    for (k, (href, text)) in crumbs.iter().enumerate() {
        if k + 1 == crumbs.len() {
            trail.push_str(&format!(
                " › <span aria-current=\"page\">{}</span>",
                esc(text)
            ));
        } else {
            trail.push_str(&format!(" › <a href=\"{}\">{}</a>", esc(href), esc(text)));
        }
    }
    format!(
        "<header class=\"pb-nav\" style=\"font-family:sans-serif;padding:6px 10px;border-bottom:1px solid #ccc;margin-bottom:8px\"><strong>packbench</strong> <nav style=\"display:inline\"><a href=\"/\">Bays</a> · <a href=\"/packs\">Packs</a>{trail}</nav></header>"
    )
}

/// A page with the console's header put first in its body.
pub fn with_nav(html: &str, crumbs: &[(String, String)]) -> String {
    let header = nav(crumbs);
    match html
        .find("<body")
        .and_then(|k| html[k..].find('>').map(|e| k + e + 1))
    {
        Some(at) => format!("{}{header}{}", &html[..at], &html[at..]),
        None => format!("{header}{html}"),
    }
}

/// The crumbs of a run's pages: its pack, then the run.
fn run_crumbs(pack: &str, run: &str, last: &str) -> Vec<(String, String)> {
    vec![
        (format!("/packs/{pack}"), pack.to_string()),
        (format!("/packs/{pack}/runs/{run}"), format!("run {run}")),
        (String::new(), last.to_string()),
    ]
}

fn page_error(status: StatusCode, what: &str) -> Response {
    let body = format!(
        "<!doctype html><meta charset=\"utf-8\"><title>packbench</title><link rel=\"stylesheet\" href=\"/style.css\"><main><p class=\"error\">{}</p><p><a href=\"/\">Bays</a> · <a href=\"/packs\">Packs</a></p></main>",
        report::markup::escape(what)
    );
    (status, Html(body)).into_response()
}

/// A pack's history with the fade charts and projection.
pub async fn pack(State(c): State<Arc<Console>>, Path(pack): Path<String>) -> Response {
    if let Some(r) = refused_names(&[("pack", &pack)]) {
        return r;
    }
    let h = match record::history::load(&c.results, &pack, None) {
        Ok(h) => h,
        Err(e) => return page_error(StatusCode::NOT_FOUND, &e.to_string()),
    };
    let mut fa = analysis::fade::trend::analyze(&h, analysis::fade::END_OF_LIFE_PCT);
    fa.flag_against(chrono::Utc::now().date_naive());
    let html = report::html::pack_report(
        &h,
        &fa,
        &record::history::capacity_curves(&h),
        &report::html::Links::Console,
    );
    Html(with_nav(&html, &[(format!("/packs/{pack}"), pack.clone())])).into_response()
}

/// One run's report (written again from its record when missing).
pub async fn run(
    State(c): State<Arc<Console>>,
    Path((pack, run)): Path<(String, String)>,
) -> Response {
    if let Some(r) = refused_names(&[("pack", &pack), ("run", &run)]) {
        return r;
    }
    let dir = c.results.join(&pack).join(&run);
    // Nothing outside the results folder is served: a pack, run or report
    // that is a symbolic link is refused.
    let crumbs = [
        (format!("/packs/{pack}"), pack.clone()),
        (String::new(), format!("run {run}")),
    ];
    let label_link = format!(
        "<p class=\"sub\"><a data-role=\"label\" href=\"/packs/{p}/runs/{r}/label\">Its label</a></p>",
        p = report::markup::escape(&pack),
        r = report::markup::escape(&run)
    );
    let served = |html: &str| {
        let page = with_nav(html, &crumbs);
        // The label's link under the header.
        let at = page.find("</header>").map_or(0, |k| k + "</header>".len());
        Html(format!("{}{label_link}{}", &page[..at], &page[at..])).into_response()
    };
    match record::write::read_inside(&c.results, &dir.join(record::REPORT_HTML)) {
        Ok(text) => return served(&text),
        Err(e) if e.kind() == std::io::ErrorKind::PermissionDenied => {
            return page_error(StatusCode::FORBIDDEN, &e.to_string())
        }
        // Missing: written again from the record below.
        Err(_) => {}
    }
    let summary = match record::read::read_summary(&dir.join(record::SUMMARY_JSON)) {
        Ok(s) => s,
        Err(e) => return page_error(StatusCode::NOT_FOUND, &e.to_string()),
    };
    match report::charts::from_log(&summary, &dir.join(record::SAMPLES_CSV)) {
        Ok(charts) => served(&report::html::run_report(&summary, &charts)),
        Err(e) => page_error(StatusCode::NOT_FOUND, &e.to_string()),
    }
}

/// The QR code of a text as SVG, sized in millimetres.
pub fn qr_svg(text: &str, size_mm: f64) -> Option<String> {
    let code = qrcode::QrCode::with_error_correction_level(text, qrcode::EcLevel::M).ok()?;
    let svg = code
        .render::<qrcode::render::svg::Color<'_>>()
        .quiet_zone(true)
        .build();
    // Sized by the label, not in pixels.
    Some(svg.replacen(
        "<svg ",
        &format!("<svg style=\"width:{size_mm}mm;height:{size_mm}mm\" "),
        1,
    ))
}

/// The pack label's figures (capacity, state of health, grade), every one
/// from the run's verdict: the capacity that counts (corrected) and its
/// state of health, as the packs list and the report show them.
pub fn label_figures(s: &record::Summary) -> (String, String, String) {
    let v = &s.verdict;
    let u = &v.uncertainty;
    let grade = match v.grade.value() {
        Some(g) => match &g.decision {
            Some(d) if d.retest => format!("{} retest", g.label),
            Some(d) if d.conditional => format!("{} cond.", g.label),
            _ => g.label.clone(),
        },
        None => "-".to_string(),
    };
    // Each figure as everywhere else, with its uncertainty where the
    // budget exists.
    let cap = match (v.corrected_ah.get(), v.measured_ah.get()) {
        (Some(a), _) => format!("{a:.2}{} Ah", record::budget::pm_short(&u.corrected_ah)),
        (None, Some(a)) => format!("{a:.2}{} Ah", record::budget::pm_short(&u.measured_ah)),
        _ => "-".into(),
    };
    let soh = match v.soh_pct.get() {
        Some(p) => format!("{p:.1} %{}", record::budget::pm_short(&u.soh_pct)),
        None => "-".into(),
    };
    (cap, soh, grade)
}

/// A pack label for a 62 mm roll (62 × 29 mm): pack id, grade, state of
/// health, capacity, date, and a QR code linking to the run's page.
pub async fn label(
    State(c): State<Arc<Console>>,
    Path((pack, run)): Path<(String, String)>,
) -> Response {
    if let Some(r) = refused_names(&[("pack", &pack), ("run", &run)]) {
        return r;
    }
    let dir = c.results.join(&pack).join(&run);
    if let Err(e) = record::write::refuse_links_below(&c.results, &dir.join(record::SUMMARY_JSON)) {
        return page_error(StatusCode::FORBIDDEN, &e.to_string());
    }
    let s = match record::read::read_summary(&dir.join(record::SUMMARY_JSON)) {
        Ok(s) => s,
        Err(e) => return page_error(StatusCode::NOT_FOUND, &e.to_string()),
    };
    let esc = report::markup::escape;
    // The code links to the public address; without one, the ids in text
    // large enough to type (the console's own address is no use off the
    // bench PC).
    let page = format!("/packs/{pack}/runs/{run}");
    let (code, note) = match &c.public_url {
        Some(base) => {
            let url = format!("{base}{page}");
            (
                format!("<div class=\"qr\">{}</div>", qr_svg(&url, 25.0).unwrap_or_default()),
                format!("The code opens <a href=\"{u}\">{u}</a>.", u = esc(&url)),
            )
        }
        None => (
            format!("<div class=\"ids\">run<br><b>{}</b></div>", esc(&run)),
            "No QR code: the console was started without --public-url (the address a phone can open)."
                .to_string(),
        ),
    };
    let (cap, soh, grade) = label_figures(&s);
    let body = format!(
        r#"<!doctype html><html lang="en"><meta charset="utf-8"><title>Label {pack_e}</title>
<style>
@page {{ size: 62mm 29mm; margin: 0 }}
body {{ margin: 0; font-family: sans-serif }}
.label {{ width: 62mm; height: 29mm; box-sizing: border-box; padding: 1.5mm 2mm; display: flex; gap: 2mm; align-items: center; border: 0.2mm dashed #999 }}
@media print {{ .label {{ border: none }} .noprint {{ display: none }} }}
.text {{ flex: 1; line-height: 1.15 }}
.id {{ font-size: 11pt; font-weight: bold }}
.grade {{ font-size: 15pt; font-weight: bold }}
.small {{ font-size: 7pt }}
.ids {{ font-size: 8pt; font-family: monospace; text-align: right; word-break: break-all; max-width: 24mm }}
</style>
{nav}
<div class="label" id="label">
<div class="text"><div class="id">{pack_e}</div><div class="grade">Grade {grade_e}</div>
<div class="small">SOH {soh} · {cap}</div><div class="small">Tested {date}</div></div>
{code}
</div>
<p class="noprint small">62 mm roll, 62 × 29 mm label. {note} <a href="{page}">Its report</a> · <a href="/">Bays</a></p>
</html>"#,
        pack_e = esc(&pack),
        grade_e = esc(&grade),
        date = esc(&s.test_date.to_string()),
        page = esc(&page),
        nav = format_args!(
            "<div class=\"noprint\">{}</div>",
            nav(&run_crumbs(&pack, &run, "label"))
        ),
    );
    Html(body).into_response()
}
