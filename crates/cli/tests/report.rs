//! `sinew report` end to end: a synthetic cohort table in, one HTML file and PNG plots out.
//! The HTML is checked with Python's standard-library parser (`html.parser`) and opened in
//! headless Chromium (Debian's `chromium` package), which must log no console message.

use sinew_testkit::{text, Sinew};
use std::fmt::Write as _;
use std::path::Path;
use std::process::{Command, Output};

const SINEW: Sinew = Sinew::new(env!("CARGO_BIN_EXE_sinew"));

const METHODS: [&str; 2] = ["sinew", "other-net"];
const LABELS: [(u16, &str); 3] = [(1, "liver"), (2, "spleen"), (3, "kidney_right")];
const SUBJECTS: [&str; 4] = ["s00", "s01", "s02", "s03"];

/// A cohort folder: scores.csv with the columns `sinew cohort` writes plus an extra one,
/// summary.json, and a qc.png in each sinew pair folder.
fn cohort(dir: &Path) {
    let mut csv = String::from(
        "method,pair,fixed,moving,label,name,dice_before,dice,hd95_mm,hd_mm,assd_mm,folding,sdlogj,jac_min,\
         landmark_mm,runtime_s,extra_column\n",
    );
    let mut pair = 0;
    for (a, fa) in SUBJECTS.iter().enumerate() {
        for fb in &SUBJECTS[a + 1..] {
            for (m, method) in METHODS.iter().enumerate() {
                for (l, name) in LABELS {
                    let dice = 0.55 + 0.05 * pair as f64 + 0.03 * l as f64 - 0.1 * m as f64;
                    let hd = if pair == 2 && l == 3 {
                        String::new()
                    } else {
                        format!("{}", 3.0 + pair as f64 - l as f64 * 0.5)
                    };
                    let _ = writeln!(
                        csv,
                        "{method},{pair},{fa},{fb},{l},{name},0.4,{dice},{hd},9,1,{},{},0.1,,{},x",
                        0.0001 * (pair + m) as f64,
                        0.05 + 0.01 * pair as f64 + 0.02 * m as f64,
                        if m == 0 { "2.5" } else { "" }
                    );
                }
            }
            let d = dir.join("pairs").join(format!("{fa}__{fb}"));
            std::fs::create_dir_all(&d).unwrap();
            sinew_qc::write_png(&d.join("qc.png"), &sinew_qc::RgbImage::new(8, 8, [40, 40, 40])).unwrap();
            pair += 1;
        }
    }
    std::fs::write(dir.join("scores.csv"), csv).unwrap();
    let summary = serde_json::json!({
        "caution": "x",
        "methods": [
            {"method": "sinew", "label": 1, "name": "liver", "dice_mean": 0.8, "nested": {"a": 1}},
            {"method": "other-net", "label": 1, "name": "liver", "dice_mean": 0.7}
        ]
    });
    std::fs::write(dir.join("summary.json"), summary.to_string()).unwrap();
}

/// Python's html.parser (standard library) walks the document: it reports unbalanced tags,
/// the figures with their data attributes, scripts, external references and the first text.
const PY_CHECK: &str = r#"
import json, sys
from html.parser import HTMLParser
VOID = {"area","base","br","col","embed","hr","img","input","link","meta","source","track","wbr",
        "path","circle","rect","line","polyline","polygon","text","ellipse","stop"}
class P(HTMLParser):
    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.stack, self.errors, self.figures, self.scripts, self.external = [], [], [], 0, []
        self.svg_in_figure, self.first_text, self.links, self.doctype = 0, None, [], False
    def handle_decl(self, d):
        self.doctype = self.doctype or d.lower() == "doctype html"
    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if tag == "script": self.scripts += 1
        for k in ("src", "href"):
            v = a.get(k) or ""
            if "://" in v or v.startswith("//"): self.external.append(v)
        if tag == "a": self.links.append(a.get("href"))
        if tag == "figure": self.figures.append({k: v for k, v in a.items() if k.startswith("data-")})
        if tag == "svg" and self.stack and self.stack[-1] == "figure": self.svg_in_figure += 1
        if tag not in VOID: self.stack.append(tag)
    def handle_startendtag(self, tag, attrs):
        self.handle_starttag(tag, attrs)
        if tag not in VOID: self.stack.pop()
    def handle_endtag(self, tag):
        if tag in VOID: return
        if not self.stack or self.stack[-1] != tag:
            self.errors.append("unexpected </%s> with open %s" % (tag, self.stack[-3:]))
            if tag in self.stack:
                while self.stack.pop() != tag: pass
        else:
            self.stack.pop()
    def handle_data(self, d):
        if self.first_text is None and d.strip() and self.stack and "body" in self.stack:
            self.first_text = d.strip()
p = P()
p.feed(open(sys.argv[1], encoding="utf-8").read())
p.close()
if p.stack: p.errors.append("unclosed %s" % p.stack)
print(json.dumps({"errors": p.errors, "figures": p.figures, "scripts": p.scripts, "external": p.external,
                  "svg_in_figure": p.svg_in_figure, "first_text": p.first_text, "links": p.links,
                  "doctype": p.doctype}))
"#;

fn python_check(html: &Path) -> serde_json::Value {
    let out = Command::new("python3")
        .arg("-c")
        .arg(PY_CHECK)
        .arg(html)
        .output()
        .expect("python3 is required for this test (CI installs it)");
    assert!(out.status.success(), "{}", text(&out.stderr));
    serde_json::from_slice(&out.stdout).unwrap()
}

/// The headless browser: `$SINEW_CHROMIUM`, else `chromium` or `chromium-browser` on PATH.
fn find_chromium() -> Option<std::path::PathBuf> {
    if let Ok(p) = std::env::var("SINEW_CHROMIUM") {
        return Some(p.into());
    }
    let path = std::env::var_os("PATH")?;
    std::env::split_paths(&path).flat_map(|d| ["chromium", "chromium-browser"].map(|n| d.join(n))).find(|p| p.is_file())
}

/// Opens `page` in headless Chromium, takes a screenshot and returns the console lines it
/// logged (Chromium prints console messages as `...:CONSOLE...] "message", source: ...`).
fn chromium(browser: &Path, page: &Path, screenshot: &Path, tmp: &Path) -> Vec<String> {
    let url = format!("file://{}", page.canonicalize().unwrap().display());
    let out: Output = Command::new(browser)
        .args(["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run"])
        .args(["--disable-background-networking", "--disable-component-update", "--disable-sync"])
        .arg(format!("--user-data-dir={}", tmp.join("chromium-profile").display()))
        .args(["--enable-logging=stderr", "--v=0", "--window-size=1300,2600"])
        .arg(format!("--screenshot={}", screenshot.display()))
        .arg(url)
        .output()
        .unwrap_or_else(|e| panic!("{}: {e}", browser.display()));
    assert!(out.status.success(), "chromium failed: {}", text(&out.stderr));
    assert!(screenshot.exists(), "no screenshot: {}", text(&out.stderr));
    text(&out.stderr).lines().filter(|l| l.contains(":CONSOLE")).map(str::to_string).collect()
}

#[test]
fn report_is_self_contained_html_with_one_plot_per_label_and_method() {
    let tmp = sinew_testkit::tempdir();
    let dir = tmp.path().join("cohort");
    std::fs::create_dir_all(&dir).unwrap();
    cohort(&dir);
    let html = dir.join("report.html");
    let out = SINEW
        .cmd()
        .args(["report", "--cohort", dir.to_str().unwrap(), "--out", html.to_str().unwrap()])
        .output()
        .unwrap();
    assert!(out.status.success(), "{}", text(&out.stderr));
    for png in ["report_dice.png", "report_hd95.png", "report_jacobian.png"] {
        let b = std::fs::read(dir.join(png)).unwrap();
        assert_eq!(&b[..8], b"\x89PNG\r\n\x1a\n", "{png}");
    }

    let v = python_check(&html);
    assert!(v["doctype"].as_bool().unwrap());
    assert_eq!(v["errors"], serde_json::json!([]), "HTML structure");
    assert_eq!(v["scripts"], 0, "no scripts");
    assert_eq!(v["external"], serde_json::json!([]), "no network references");
    // The report opens with the research-use caution.
    assert!(v["first_text"].as_str().unwrap().starts_with("Caution"), "{}", v["first_text"]);
    let figs = v["figures"].as_array().unwrap();
    for metric in ["dice", "hd95"] {
        let labels: Vec<&str> =
            figs.iter().filter(|f| f["data-metric"] == metric).map(|f| f["data-label"].as_str().unwrap()).collect();
        assert_eq!(labels, LABELS.map(|l| l.1), "one {metric} plot per label");
        assert!(figs.iter().filter(|f| f["data-metric"] == metric).all(|f| f["data-methods"] == "2"));
    }
    let methods: Vec<&str> =
        figs.iter().filter(|f| f["data-metric"] == "jacobian").map(|f| f["data-method"].as_str().unwrap()).collect();
    assert_eq!(methods, METHODS, "one folding/SDlogJ plot per method");
    assert_eq!(v["svg_in_figure"].as_u64().unwrap() as usize, figs.len(), "each figure holds an inline SVG");
    // QC sheets of the worst, median and best sinew pairs. Mean Dice rises with the pair
    // index, so worst = s00__s01 (pair 0), median = pair (6−1)/2 = 2 (s00__s03), best = s02__s03.
    let links: Vec<&str> = v["links"].as_array().unwrap().iter().filter_map(|l| l.as_str()).collect();
    let sheets: Vec<&str> = links.iter().copied().filter(|l| l.ends_with("qc.png")).collect();
    assert_eq!(sheets[..3], ["pairs/s00__s01/qc.png", "pairs/s00__s03/qc.png", "pairs/s02__s03/qc.png"]);
    for l in &links {
        assert!(dir.join(l).exists(), "dead link {l}");
    }
    let body = std::fs::read_to_string(&html).unwrap();
    assert!(body.contains("summary.json") && body.contains("other-net"));

    // Headless Chromium shows it without console messages; a page that logs an error is
    // caught by the same check (so the check can fail). Without a browser the check is
    // skipped with the reason printed, unless SINEW_REQUIRE_CHROMIUM is set (CI sets it).
    let Some(browser) = find_chromium() else {
        assert!(
            std::env::var_os("SINEW_REQUIRE_CHROMIUM").is_none(),
            "chromium not found on PATH (nor SINEW_CHROMIUM) and SINEW_REQUIRE_CHROMIUM is set"
        );
        eprintln!(
            "SKIPPED the report's browser check: chromium not found on PATH (nor SINEW_CHROMIUM); \
             scripts/setup-test-env.sh installs it where apt-get and root are available"
        );
        return;
    };
    let shot = tmp.path().join("report.png");
    let console = chromium(&browser, &html, &shot, tmp.path());
    assert!(console.is_empty(), "console messages: {console:?}");
    let neg = tmp.path().join("negative.html");
    std::fs::write(
        &neg,
        "<!DOCTYPE html><html><body><script>console.error('sinew-negative-control')</script></body></html>",
    )
    .unwrap();
    let console = chromium(&browser, &neg, &tmp.path().join("neg.png"), tmp.path());
    assert!(console.iter().any(|l| l.contains("sinew-negative-control")), "the console check sees errors");
    if let Ok(keep) = std::env::var("SINEW_QC_KEEP") {
        std::fs::copy(&shot, Path::new(&keep).join("report_screenshot.png")).unwrap();
        std::fs::copy(&html, Path::new(&keep).join("report.html")).unwrap();
        for png in ["report_dice.png", "report_hd95.png", "report_jacobian.png"] {
            std::fs::copy(dir.join(png), Path::new(&keep).join(png)).unwrap();
        }
    }
}

#[test]
fn missing_or_malformed_tables_are_clear_errors() {
    let tmp = sinew_testkit::tempdir();
    let run = |dir: &Path| {
        SINEW
            .cmd()
            .args(["report", "--cohort", dir.to_str().unwrap(), "--out", tmp.path().join("r.html").to_str().unwrap()])
            .output()
            .unwrap()
    };
    let out = run(tmp.path());
    assert_eq!(out.status.code(), Some(2));
    assert!(text(&out.stderr).contains("scores.csv"), "{}", text(&out.stderr));
    std::fs::write(tmp.path().join("scores.csv"), "method,fixed,moving,label\nsinew,a,b,1\n").unwrap();
    let out = run(tmp.path());
    assert!(text(&out.stderr).contains("no column 'dice'"), "{}", text(&out.stderr));
    std::fs::write(
        tmp.path().join("scores.csv"),
        "method,fixed,moving,label,dice,hd95_mm,folding,sdlogj\nsinew,a,b,1,zero,1,0,0\n",
    )
    .unwrap();
    let out = run(tmp.path());
    assert!(text(&out.stderr).contains("line 2: dice 'zero'"), "{}", text(&out.stderr));
    assert!(!tmp.path().join("r.html").exists());
}
