//! `holdout report` through the real daemon: an analyst's view of a holdout drawn as SVG, PNG and
//! HTML, each file parsed back, one point per released answer, the refusal counted.

mod common;

use common::{Daemon, Parts};

const N: usize = 2000;

#[test]
fn report_writes_svg_png_and_html_with_one_point_per_answer() {
    let d = Daemon::start();
    let labels = d.write("labels.csv", &Parts::new(N).labels_csv());
    d.admin(&[
        "create",
        "qc",
        "--labels",
        &labels,
        "--metric",
        "error",
        "--classes",
        "crack,dent,ok",
        "--label-column",
        "defect",
        "--answers",
        "rounded:0.01",
        "--tolerance",
        "0.1",
    ])
    .ok();
    let hana = d.add_user("hana", &["analyst"], Some("red"));
    let omar = d.add_user("omar", &["analyst"], Some("blue"));
    // Alternate teams and files until the holdout refuses.
    let mut answers = 0;
    let mut refused = false;
    for i in 0..60 {
        let file = d.write(
            &format!("p{i}.csv"),
            &Parts::new(N).defect_predictions(3 + i % 9, i),
        );
        let who = if i % 2 == 0 { &hana } else { &omar };
        let run = d.run(who, &["submit", "qc", "--predictions", &file]);
        match run.code {
            0 => answers += 1,
            3 => {
                refused = true;
                break;
            }
            other => panic!("submit exited {other}: {}", run.stderr),
        }
    }
    assert!(refused, "the holdout never refused in 60 submissions");
    assert!(answers >= 3, "{answers} answers");

    // SVG: parses, one point per answer.
    let svg_path = d.path("qc.svg");
    let summary = d
        .run(
            &hana,
            &[
                "report",
                "qc",
                "--out",
                svg_path.to_str().unwrap(),
                "--json",
            ],
        )
        .ok()
        .json();
    assert_eq!(summary["answers"], answers, "{summary}");
    assert_eq!(summary["refusals"], 1, "{summary}");
    assert_eq!(summary["teams"], serde_json::json!(["red", "blue"]));
    let svg = std::fs::read_to_string(&svg_path).unwrap();
    assert_eq!(svg.matches("<circle").count(), answers);
    resvg::usvg::Tree::from_str(&svg, &resvg::usvg::Options::default()).expect("SVG parses");
    assert!(
        svg.contains("With probability at least 1 -"),
        "guarantee under the charts"
    );

    // PNG: decodes at a sensible size.
    let png_path = d.path("qc.png");
    d.run(
        &hana,
        &["report", "qc", "--out", png_path.to_str().unwrap()],
    )
    .ok();
    let bytes = std::fs::read(&png_path).unwrap();
    let pixmap = resvg::tiny_skia::Pixmap::decode_png(&bytes).expect("a PNG");
    assert!(pixmap.width() >= 800 && pixmap.height() >= 800);

    // HTML: a page holding the same chart and the guarantee as text.
    let html_path = d.path("qc.html");
    d.run(
        &omar,
        &["report", "qc", "--out", html_path.to_str().unwrap()],
    )
    .ok();
    let page = std::fs::read_to_string(&html_path).unwrap();
    assert!(page.starts_with("<!doctype html>"));
    assert_eq!(page.matches("<circle").count(), answers);
    assert!(page.contains("<p>With probability at least 1 -"));

    // An existing file is not replaced without --overwrite; an unknown extension is bad input.
    d.run(
        &hana,
        &["report", "qc", "--out", svg_path.to_str().unwrap()],
    )
    .code(2);
    let pdf = d.path("qc.pdf");
    d.run(&hana, &["report", "qc", "--out", pdf.to_str().unwrap()])
        .code(2);
    d.run(
        &hana,
        &[
            "report",
            "qc",
            "--out",
            svg_path.to_str().unwrap(),
            "--overwrite",
        ],
    )
    .ok();
}
