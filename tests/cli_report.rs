//! `--report` on select, shift, audit and rescreen: report.html is written with the other
//! outputs, is self-contained (no scripts, no external addresses) and carries the cautions
//! (design.md section 1), the selection plot and the level curve, and, with fitted weights,
//! the three shift plots. For people and for print (issue 12 item 8): plot text at least
//! 11 px at 100% zoom, tables in the page flow, at most 100 rows of a long table with the
//! file that has the rest, the prediction and selection probability columns, and for
//! rescreen a changes section. Structural checks only; tests/scripts/render_report.sh
//! renders the demo's report in headless Chromium and measures the text there.

use std::fs;
use std::path::{Path, PathBuf};
use std::process::Command;

use tempfile::TempDir;

fn fixture(name: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("fixtures")
        .join(name)
}

fn run_ok(args: &[&str]) {
    let output = Command::new(env!("CARGO_BIN_EXE_weighbridge"))
        .args(args)
        .output()
        .expect("run weighbridge");
    assert!(
        output.status.success(),
        "{args:?}: {}",
        String::from_utf8_lossy(&output.stderr)
    );
}

/// The effective font sizes (px at 100% zoom) of every text in every inline SVG: the
/// font-size attribute times the SVG's width over its viewBox width (an SVG drawn with a
/// viewBox is scaled to its width, text included).
fn effective_font_sizes(html: &str) -> Vec<f64> {
    let attribute = |tag: &str, name: &str| -> Option<String> {
        let at = tag.find(&format!(" {name}=\""))? + name.len() + 3;
        let end = tag[at..].find('"')? + at;
        Some(tag[at..end].to_string())
    };
    let mut sizes = Vec::new();
    for (start, _) in html.match_indices("<svg") {
        let end = html[start..].find("</svg>").unwrap() + start;
        let svg = &html[start..end];
        let tag = &svg[..svg.find('>').unwrap()];
        let width: f64 = attribute(tag, "width").unwrap().parse().unwrap();
        let view = attribute(tag, "viewBox").expect("a viewBox");
        let view_width: f64 = view.split_whitespace().nth(2).unwrap().parse().unwrap();
        for (at, _) in svg.match_indices(" font-size=\"") {
            let size: f64 = attribute(&svg[at..], "font-size").unwrap().parse().unwrap();
            sizes.push(size * width / view_width);
        }
    }
    sizes
}

/// The page's CSS (the one <style> element).
fn style(html: &str) -> &str {
    let start = html.find("<style>").unwrap();
    &html[start..html.find("</style>").unwrap()]
}

fn check_page(path: &Path, svgs: usize) -> String {
    let html = fs::read_to_string(path).unwrap();
    assert!(
        html.starts_with("<!DOCTYPE html>") || html.starts_with("<!doctype html>"),
        "{path:?}"
    );
    assert!(!html.contains("<script"), "{path:?} has a script");
    assert!(
        !html.contains("http://") && !html.contains("https://"),
        "{path:?} refers outside"
    );
    assert!(
        html.contains("not a safety, clinical or"),
        "{path:?} lacks the cautions"
    );
    assert_eq!(html.matches("<svg").count(), svgs, "{path:?} plots");
    // Readable plot text: at least 11 px (issue 12 item 8). The SVGs are drawn at their
    // display width, and the screen CSS must not shrink them (only print fits them to the
    // paper).
    let sizes = effective_font_sizes(&html);
    assert_eq!(sizes.is_empty(), svgs == 0);
    for size in sizes {
        assert!(size >= 11.0, "{path:?}: plot text of {size} px");
    }
    let css = style(&html);
    let print = css.find("@media print").expect("print CSS");
    for (at, _) in css.match_indices("max-width: 100%") {
        assert!(at > print, "{path:?}: plots shrink to the page on screen");
    }
    // Tables in the page flow: no scroll boxes, no height limits.
    for banned in [
        "class=\"scroll\"",
        "max-height",
        "overflow-y",
        "overflow: auto",
    ] {
        assert!(!html.contains(banned), "{path:?} has `{banned}`");
    }
    assert!(css.contains("thead { display: table-header-group; }"));
    html
}

/// The SVG whose text contains `title`.
fn plot_with<'a>(html: &'a str, title: &str) -> &'a str {
    let at = html
        .find(title)
        .unwrap_or_else(|| panic!("no plot titled {title}"));
    let start = html[..at].rfind("<svg").unwrap();
    let end = html[at..].find("</svg>").unwrap() + at;
    &html[start..end]
}

/// The rows of candidates.csv: (id, selected, first_step, selection_probability).
fn candidates(dir: &Path) -> Vec<(String, bool, bool, f64)> {
    let mut reader = csv::Reader::from_path(dir.join("candidates.csv")).unwrap();
    let header = reader.headers().unwrap().clone();
    let col = |name: &str| header.iter().position(|h| h == name).unwrap();
    let (id, sel, first, prob) = (
        col("id"),
        col("selected"),
        col("first_step"),
        col("selection_probability"),
    );
    reader
        .records()
        .map(|r| {
            let r = r.unwrap();
            (
                r[id].to_string(),
                &r[sel] == "true",
                &r[first] == "true",
                r[prob].parse().unwrap(),
            )
        })
        .collect()
}

/// The shortlist table (select with given weights at FDR 0.3, 523 of 2000 selected on the
/// fixtures): the first 100 rows, the pointer to the file with the rest, best prediction
/// first, the prediction and selection probability columns agreeing with the inputs and
/// candidates.csv; the selection plot has one mark per pool unit (2000, under the cap of
/// 3000) plus one per legend entry.
#[test]
fn shortlist_table_and_selection_plot() {
    let dir = TempDir::new().unwrap();
    let out = dir.path().join("select");
    run_ok(&[
        "select",
        "--labeled",
        fixture("labeled.csv").to_str().unwrap(),
        "--pool",
        fixture("pool.csv").to_str().unwrap(),
        "--threshold",
        "6.5",
        "--weight-column",
        "w",
        "--fdr",
        "0.3",
        "--report",
        "--quiet",
        "--out",
        out.to_str().unwrap(),
    ]);
    let html = check_page(&out.join("report.html"), 2);
    // The warnings table speaks the ordered scale of summary.json `warning_details`
    // (low < medium < high), one row per warning, in the same order; the settings say
    // what "interesting" means in words.
    let summary: serde_json::Value =
        serde_json::from_slice(&fs::read(out.join("summary.json")).unwrap()).unwrap();
    let levels: Vec<String> = summary["warning_details"]
        .as_array()
        .unwrap()
        .iter()
        .map(|w| w["level"].as_str().unwrap().to_string())
        .collect();
    assert!(
        !levels.is_empty(),
        "the fixture run warns (the draw, unreachable units)"
    );
    let table_start = html.find("<th>concern</th>").expect("a concern column");
    let table = &html[table_start..table_start + html[table_start..].find("</table>").unwrap()];
    let shown: Vec<&str> = table
        .split("<tr class=\"")
        .skip(1)
        .map(|row| {
            row.split("</td><td>")
                .nth(1)
                .unwrap()
                .split('<')
                .next()
                .unwrap()
        })
        .collect();
    assert_eq!(shown, levels, "report rows follow warning_details");
    assert!(html.contains("outcome above 6.5"), "threshold in words");
    let units = candidates(&out);
    let selected: Vec<&(String, bool, bool, f64)> = units.iter().filter(|u| u.1).collect();
    assert!(selected.len() > 100, "the test needs a long shortlist");
    // The pool's predictions, by id.
    let mut reader = csv::Reader::from_path(fixture("pool.csv")).unwrap();
    let header = reader.headers().unwrap().clone();
    let pred = header.iter().position(|h| h == "pred").unwrap();
    let predictions: std::collections::HashMap<String, f64> = reader
        .records()
        .map(|r| {
            let r = r.unwrap();
            (r[0].to_string(), r[pred].parse().unwrap())
        })
        .collect();

    let start = html.find("<section id=\"shortlist\">").unwrap();
    let section = &html[start..html[start..].find("</section>").unwrap() + start];
    let table = &section[section.find("<table>").unwrap()..section.find("</table>").unwrap()];
    let header_row = &table[..table.find("</tr>").unwrap()];
    let columns: Vec<&str> = header_row
        .split("<th>")
        .skip(1)
        .map(|c| c.trim_end_matches("</th>"))
        .collect();
    assert_eq!(
        columns,
        [
            "rank",
            "id",
            "prediction",
            "p-value",
            "q-value",
            "selection probability",
            "weight",
            "score"
        ]
    );
    let rows: Vec<Vec<String>> = table
        .split("<tr>")
        .skip(2)
        .map(|row| {
            row.split("<td")
                .skip(1)
                .map(|cell| {
                    let text = &cell[cell.find('>').unwrap() + 1..];
                    text[..text.find("</td>").unwrap()].to_string()
                })
                .collect()
        })
        .collect();
    assert_eq!(rows.len(), 100, "the first 100 rows");
    assert!(section.contains(&format!(
        "The first 100 of {} rows are shown; the other {} are in shortlist.csv",
        selected.len(),
        selected.len() - 100
    )));
    let probability: std::collections::HashMap<&str, f64> =
        selected.iter().map(|u| (u.0.as_str(), u.3)).collect();
    let mut previous = f64::INFINITY;
    for (rank, row) in rows.iter().enumerate() {
        assert_eq!(row[0], (rank + 1).to_string());
        let truth = predictions[&row[1]];
        let shown: f64 = row[2].parse().unwrap();
        // Shown with 3 decimals: within half a unit of the last place (and float error).
        assert!((shown - truth).abs() <= 5.01e-4, "{row:?} vs {truth}");
        assert!(truth <= previous, "best prediction first: {row:?}");
        previous = truth;
        let p: f64 = row[5].parse().unwrap();
        assert!(
            (p - probability[row[1].as_str()]).abs() <= 5.01e-4,
            "{row:?}"
        );
    }
    // The best predicted selected unit is first.
    let best = selected
        .iter()
        .max_by(|a, b| predictions[&a.0].total_cmp(&predictions[&b.0]))
        .unwrap();
    assert_eq!(rows[0][1], best.0);

    let plot = plot_with(&html, "Selection: prediction against weight");
    let pruned = units.iter().any(|u| u.2 && !u.1);
    let legend_circles = if pruned { 3 } else { 2 };
    assert_eq!(
        plot.matches("<circle").count(),
        units.len() + legend_circles,
        "one mark per pool unit"
    );
    assert!(plot.contains("outcome threshold 6.5"));
    assert!(plot.contains(&format!("selected ({})", selected.len())));
    assert!(section.contains(&format!("It marks all {} selected", selected.len())));
    // The level curve of summary.json is drawn.
    plot_with(&html, "Shortlist size by FDR level");
}

#[test]
fn every_command_writes_a_self_contained_report() {
    let dir = TempDir::new().unwrap();
    let labeled = fixture("labeled.csv");
    let pool = fixture("pool.csv");
    let (l, p) = (labeled.to_str().unwrap(), pool.to_str().unwrap());
    let out = |name: &str| dir.path().join(name);
    let select = out("select");
    run_ok(&[
        "select",
        "--labeled",
        l,
        "--pool",
        p,
        "--threshold",
        "6.5",
        "--fit-weights",
        "--features",
        "f1..f5",
        "--permutations",
        "19",
        "--report",
        "--quiet",
        "--out",
        select.to_str().unwrap(),
    ]);
    // The selection plot, the level curve and the three shift plots.
    check_page(&select.join("report.html"), 5);
    let shift = out("shift");
    run_ok(&[
        "shift",
        "--labeled",
        l,
        "--pool",
        p,
        "--features",
        "f1..f5",
        "--permutations",
        "19",
        "--report",
        "--quiet",
        "--out",
        shift.to_str().unwrap(),
    ]);
    check_page(&shift.join("report.html"), 3);
    let list = out("list.csv");
    fs::write(&list, "id\nLKS-P-000001\nLKS-P-000002\n").unwrap();
    let audit = out("audit");
    run_ok(&[
        "audit",
        "--shortlist",
        list.to_str().unwrap(),
        "--labeled",
        l,
        "--pool",
        p,
        "--threshold",
        "6.5",
        "--weight-column",
        "w",
        "--report",
        "--quiet",
        "--out",
        audit.to_str().unwrap(),
    ]);
    let html = check_page(&audit.join("report.html"), 0);
    assert!(html.contains("LKS-P-000002"));
    let rescreen = out("rescreen");
    run_ok(&[
        "rescreen",
        "--previous",
        select.to_str().unwrap(),
        "--labeled",
        l,
        "--pool",
        p,
        "--threshold",
        "6.5",
        "--weight-column",
        "w",
        "--report",
        "--quiet",
        "--out",
        rescreen.to_str().unwrap(),
    ]);
    // The selection plot and the level curve; the changes section with its table.
    let html = check_page(&rescreen.join("report.html"), 2);
    let start = html
        .find("<section id=\"changes\">")
        .expect("a changes section");
    let changes = &html[start..html[start..].find("</section>").unwrap() + start];
    assert!(changes.contains("Against the previous run: the pool went from 2000 to 2000 units"));
    assert!(changes.contains("<th>why</th>"));
    // Fitted weights before, the exact ratio now: the shortlists differ, and each changed
    // unit is a row (changes.csv has the same units).
    let mut reader = csv::Reader::from_path(rescreen.join("changes.csv")).unwrap();
    let header = reader.headers().unwrap().clone();
    let change = header.iter().position(|h| h == "change").unwrap();
    let changed: Vec<String> = reader
        .records()
        .map(|r| r.unwrap())
        .filter(|r| {
            ["newly selected", "dropped", "new to the pool, selected"].contains(&&r[change])
        })
        .map(|r| r[0].to_string())
        .collect();
    assert!(!changed.is_empty(), "the test needs a change");
    for id in changed.iter().take(100) {
        assert!(
            changes.contains(&format!("<td class=\"word\">{id}</td>")),
            "{id}"
        );
    }
    assert_eq!(
        changes.matches("<tr>").count(),
        1 + changed.len().min(100),
        "one row per changed unit"
    );
    // Without --report nothing extra is written.
    let plain = out("plain");
    run_ok(&[
        "select",
        "--labeled",
        l,
        "--pool",
        p,
        "--threshold",
        "6.5",
        "--quiet",
        "--out",
        plain.to_str().unwrap(),
    ]);
    assert!(!plain.join("report.html").exists());
}
