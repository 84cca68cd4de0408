//! Pictures of a holdout: the budget burn-down and every released interval, as SVG, PNG or a
//! self-contained HTML page.
//!
//! Only released facts are drawn: each answer's released value and interval, the budget figures
//! its reply carried (spent, transcript, next half-width), refusals, the policy's tolerance and
//! the guarantee sentence. Never an exact score, never a label: a report is as safe to pass
//! around as the history it was made from.
//!
//! Charts are drawn with plotters into SVG. PNG is that SVG rasterised by resvg with a font
//! compiled into the binary (DejaVu Sans, see `src/report/LICENSE-DejaVu.txt`), so a PNG looks
//! the same on every machine and needs no system fonts.

use std::fmt::Write as _;

use plotters::prelude::*;

use crate::error::{Error, Result};
use crate::ledger::Kind;
use crate::proto::v1::{HistoryEntry, HoldoutInfo};

/// The font every picture's text is set in.
const FONT: &[u8] = include_bytes!("report/DejaVuSans.ttf");

/// Width of the picture, in pixels.
const WIDTH: u32 = 1000;
/// Heights of the title, the intervals chart and the burn-down charts; the text under them
/// takes what its lines need (see [`size`]).
const TITLE_HEIGHT: u32 = 50;
const INTERVALS_HEIGHT: u32 = 420;
const BURN_HEIGHT: u32 = 560;
/// Characters per line of the text under the charts, and pixels per line.
const TEXT_COLUMNS: usize = 150;
const LINE_HEIGHT: u32 = 17;

/// Width and height of `data`'s picture: the charts, then every line of the guarantee.
fn size(data: &ReportData) -> (u32, u32) {
    let lines = wrap(&data.guarantee, TEXT_COLUMNS).len() as u32;
    (
        WIDTH,
        TITLE_HEIGHT + INTERVALS_HEIGHT + BURN_HEIGHT + 10 + LINE_HEIGHT * lines + 10,
    )
}

/// One released answer.
#[derive(Debug, Clone, PartialEq)]
pub struct AnswerPoint {
    /// Query number.
    pub query: u64,
    /// Team that asked.
    pub team: String,
    /// The released value when the symbol is a number; `None` for pass, fail, no improvement.
    pub value: Option<f64>,
    /// Interval.
    pub lower: f64,
    /// Interval.
    pub upper: f64,
    /// Budget spent after it, as a fraction of delta.
    pub spent: f64,
    /// Transcript after it, nats.
    pub transcript_nats: f64,
    /// Half-width the next answer would have.
    pub next_half_width: f64,
}

impl AnswerPoint {
    /// Where its point is drawn: the released value, else the middle of its interval.
    pub fn y(&self) -> f64 {
        self.value.unwrap_or((self.lower + self.upper) / 2.0)
    }
}

/// What a report draws.
#[derive(Debug, Clone, PartialEq)]
pub struct ReportData {
    /// Holdout name.
    pub holdout: String,
    /// Rows.
    pub rows: u64,
    /// Total failure probability.
    pub delta: f64,
    /// Widest half-width the holdout answers.
    pub tolerance: f64,
    /// Answers, in ledger order.
    pub answers: Vec<AnswerPoint>,
    /// Refusals: the number of answers released before each.
    pub refusals: Vec<u64>,
    /// The guarantee sentence with its assumptions.
    pub guarantee: String,
}

impl ReportData {
    /// Collects a holdout's released answers and refusals from its history. Exact scores in the
    /// history (an auditor's view) are ignored.
    pub fn from_history(info: &HoldoutInfo, history: &[HistoryEntry]) -> ReportData {
        let policy = info.policy.clone().unwrap_or_default();
        let delta = policy.delta;
        let mut answers = Vec::new();
        let mut refusals = Vec::new();
        for e in history {
            match Kind::parse(&e.kind) {
                Some(Kind::Answer) => {
                    let Some(a) = &e.answer else { continue };
                    let b = a.budget.clone().unwrap_or_default();
                    let (lower, upper) = a
                        .interval
                        .as_ref()
                        .map_or((0.0, 1.0), |i| (i.lower, i.upper));
                    answers.push(AnswerPoint {
                        query: a.query,
                        team: e.team.clone(),
                        value: a.symbol.parse::<f64>().ok().filter(|v| v.is_finite()),
                        lower,
                        upper,
                        spent: if delta > 0.0 { b.spent / delta } else { 0.0 },
                        transcript_nats: b.transcript_nats,
                        next_half_width: b.next_half_width,
                    });
                }
                Some(Kind::Refusal) => refusals.push(answers.len() as u64),
                _ => {}
            }
        }
        ReportData {
            holdout: info.name.clone(),
            rows: info.rows,
            delta,
            tolerance: policy.tolerance,
            answers,
            refusals,
            guarantee: info.guarantee.clone(),
        }
    }

    /// The teams in order of first answer.
    pub fn teams(&self) -> Vec<String> {
        let mut teams: Vec<String> = Vec::new();
        for a in &self.answers {
            if !teams.contains(&a.team) {
                teams.push(a.team.clone());
            }
        }
        teams
    }
}

/// The file types a report can be written as.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Format {
    /// Scalable vector graphics.
    Svg,
    /// A raster image.
    Png,
    /// A self-contained web page (the SVG inline).
    Html,
}

impl Format {
    /// The format named by a file's extension.
    ///
    /// # Errors
    /// [`Error::InvalidArgument`] for any other extension.
    pub fn from_path(path: &std::path::Path) -> Result<Format> {
        let ext = path
            .extension()
            .and_then(|e| e.to_str())
            .map(str::to_ascii_lowercase);
        match ext.as_deref() {
            Some("svg") => Ok(Format::Svg),
            Some("png") => Ok(Format::Png),
            Some("html" | "htm") => Ok(Format::Html),
            _ => Err(Error::invalid(
                "--out",
                format!(
                    "{}: the extension says the format; use .svg, .png or .html",
                    path.display()
                ),
            )),
        }
    }
}

/// Renders the report in `format`.
///
/// # Errors
/// [`Error::Internal`] when drawing or rasterising fails.
pub fn render(data: &ReportData, format: Format) -> Result<Vec<u8>> {
    let svg = svg(data)?;
    match format {
        Format::Svg => Ok(svg.into_bytes()),
        Format::Png => png(&svg),
        Format::Html => Ok(html(data, &svg).into_bytes()),
    }
}

fn draw_error<E: std::fmt::Debug>(e: E) -> Error {
    Error::Internal(format!("drawing the report failed: {e:?}"))
}

/// Splits `text` into lines of at most `width` characters, at spaces.
fn wrap(text: &str, width: usize) -> Vec<String> {
    let mut lines = Vec::new();
    for paragraph in text.lines() {
        let mut line = String::new();
        for word in paragraph.split_whitespace() {
            if !line.is_empty() && line.chars().count() + 1 + word.chars().count() > width {
                lines.push(std::mem::take(&mut line));
            }
            if !line.is_empty() {
                line.push(' ');
            }
            line.push_str(word);
        }
        lines.push(line);
    }
    lines
}

/// The report as an SVG document: the intervals chart on top, the burn-down below (budget
/// spent, transcript, next half-width against the tolerance; refusals marked), the guarantee
/// under the charts.
///
/// # Errors
/// [`Error::Internal`] when drawing fails.
pub fn svg(data: &ReportData) -> Result<String> {
    let mut out = String::new();
    {
        let root = SVGBackend::with_string(&mut out, size(data)).into_drawing_area();
        root.fill(&WHITE).map_err(draw_error)?;
        let (title, rest) = root.split_vertically(TITLE_HEIGHT);
        let (intervals, rest) = rest.split_vertically(INTERVALS_HEIGHT);
        let (burn, words) = rest.split_vertically(BURN_HEIGHT);
        title
            .draw_text(
                &format!(
                    "{}: {}, {} ({} rows, delta {}, tolerance +-{})",
                    data.holdout,
                    count(data.answers.len(), "answer", "answers"),
                    count(data.refusals.len(), "refusal", "refusals"),
                    data.rows,
                    data.delta,
                    data.tolerance
                ),
                &("sans-serif", 20).into_font().color(&BLACK),
                (20, 18),
            )
            .map_err(draw_error)?;
        draw_intervals(&intervals, data)?;
        draw_burn_down(&burn, data)?;
        let style = ("sans-serif", 13).into_font().color(&BLACK);
        for (i, line) in wrap(&data.guarantee, TEXT_COLUMNS).iter().enumerate() {
            words
                .draw_text(line, &style, (20, 10 + (LINE_HEIGHT as usize * i) as i32))
                .map_err(draw_error)?;
        }
        root.present().map_err(draw_error)?;
    }
    Ok(out)
}

fn count(n: usize, one: &str, many: &str) -> String {
    format!("{n} {}", if n == 1 { one } else { many })
}

fn x_range(data: &ReportData) -> std::ops::Range<f64> {
    let last = data.answers.iter().map(|a| a.query).max().unwrap_or(0);
    let refused = data.refusals.iter().map(|r| r + 1).max().unwrap_or(0);
    0.0..(last.max(refused) as f64 + 1.0)
}

/// How many query-number labels the x axes ask for: never more than the range has whole
/// numbers, so the steps plotters picks (1, 2, 5, 10, ...) are whole and no label repeats.
fn x_labels(data: &ReportData) -> usize {
    (x_range(data).end as usize).clamp(1, 10)
}

fn draw_intervals<DB: DrawingBackend>(
    area: &DrawingArea<DB, plotters::coord::Shift>,
    data: &ReportData,
) -> Result<()> {
    let lo = data
        .answers
        .iter()
        .map(|a| a.lower)
        .fold(f64::INFINITY, f64::min);
    let hi = data
        .answers
        .iter()
        .map(|a| a.upper)
        .fold(f64::NEG_INFINITY, f64::max);
    let (lo, hi) = if lo.is_finite() && hi.is_finite() && hi > lo {
        let pad = (hi - lo) * 0.05;
        ((lo - pad).max(0.0), (hi + pad).min(1.0).max(lo + 0.01))
    } else {
        (0.0, 1.0)
    };
    let mut chart = ChartBuilder::on(area)
        .caption(
            "Every released answer and its interval, by query (colour: team)",
            ("sans-serif", 17),
        )
        .margin(14)
        .x_label_area_size(36)
        .y_label_area_size(56)
        .build_cartesian_2d(x_range(data), lo..hi)
        .map_err(draw_error)?;
    chart
        .configure_mesh()
        .x_desc("query")
        .x_labels(x_labels(data))
        .x_label_formatter(&|x| format!("{x:.0}"))
        .y_desc("loss")
        .light_line_style(WHITE.mix(0.0))
        .draw()
        .map_err(draw_error)?;
    for (i, team) in data.teams().iter().enumerate() {
        let colour = Palette99::pick(i).to_rgba();
        let mine: Vec<&AnswerPoint> = data.answers.iter().filter(|a| &a.team == team).collect();
        chart
            .draw_series(mine.iter().map(|a| {
                PathElement::new(
                    vec![(a.query as f64, a.lower), (a.query as f64, a.upper)],
                    colour.stroke_width(2),
                )
            }))
            .map_err(draw_error)?;
        chart
            .draw_series(
                mine.iter()
                    .map(|a| Circle::new((a.query as f64, a.y()), 4, colour.filled())),
            )
            .map_err(draw_error)?
            .label(team.as_str())
            .legend(move |(x, y)| Rectangle::new([(x, y - 5), (x + 10, y + 5)], colour.filled()));
    }
    chart
        .configure_series_labels()
        .background_style(WHITE.mix(0.9))
        .border_style(BLACK.mix(0.4))
        .draw()
        .map_err(draw_error)?;
    Ok(())
}

/// A burn-down panel: caption, unit, the figure drawn, and its limit line.
type Panel = (
    &'static str,
    &'static str,
    fn(&AnswerPoint) -> f64,
    Option<f64>,
);

fn draw_burn_down<DB: DrawingBackend>(
    area: &DrawingArea<DB, plotters::coord::Shift>,
    data: &ReportData,
) -> Result<()> {
    let panels = area.split_evenly((3, 1));
    // The x of each answer and of each refusal (placed where the next query would have been).
    let series = |f: fn(&AnswerPoint) -> f64| -> Vec<(f64, f64)> {
        data.answers
            .iter()
            .map(|a| (a.query as f64, f(a)))
            .collect()
    };
    let refusal_x: Vec<f64> = data
        .refusals
        .iter()
        .map(|r| {
            data.answers
                .get((*r as usize).saturating_sub(1))
                .map_or(1.0, |a| a.query as f64 + 1.0)
        })
        .collect();
    let specs: [Panel; 3] = [
        (
            "Budget spent, as a fraction of delta",
            "spent / delta",
            |a| a.spent,
            Some(1.0),
        ),
        (
            "Transcript: information released so far (nats)",
            "nats",
            |a| a.transcript_nats,
            None,
        ),
        (
            "Half-width of the next answer, against the tolerance (red)",
            "half-width",
            |a| a.next_half_width,
            Some(data.tolerance),
        ),
    ];
    for (panel, (caption, unit, f, limit)) in panels.iter().zip(specs) {
        let points = series(f);
        let top = points
            .iter()
            .map(|p| p.1)
            .chain(limit)
            .fold(0.0f64, f64::max)
            .max(1e-9)
            * 1.1;
        let mut chart = ChartBuilder::on(panel)
            .caption(caption, ("sans-serif", 15))
            .margin(10)
            .x_label_area_size(30)
            .y_label_area_size(56)
            .build_cartesian_2d(x_range(data), 0.0..top)
            .map_err(draw_error)?;
        chart
            .configure_mesh()
            .x_desc("query")
            .x_labels(x_labels(data))
            .x_label_formatter(&|x| format!("{x:.0}"))
            .y_desc(unit)
            .light_line_style(WHITE.mix(0.0))
            .draw()
            .map_err(draw_error)?;
        chart
            .draw_series(LineSeries::new(points, BLUE.stroke_width(2)))
            .map_err(draw_error)?;
        if let Some(limit) = limit {
            let r = x_range(data);
            chart
                .draw_series(LineSeries::new(
                    vec![(r.start, limit), (r.end, limit)],
                    RED.stroke_width(1),
                ))
                .map_err(draw_error)?;
        }
        // Refusals: a red cross on the limit (or at the top) where the next query would be.
        let y = limit.unwrap_or(top / 1.1);
        chart
            .draw_series(
                refusal_x
                    .iter()
                    .map(|x| Cross::new((*x, y), 6, RED.stroke_width(2))),
            )
            .map_err(draw_error)?;
    }
    Ok(())
}

/// Rasterises an SVG document with the compiled-in font.
fn png(svg: &str) -> Result<Vec<u8>> {
    let mut options = resvg::usvg::Options::default();
    {
        let db = options.fontdb_mut();
        db.load_font_data(FONT.to_vec());
        db.set_sans_serif_family("DejaVu Sans");
    }
    let tree = resvg::usvg::Tree::from_str(svg, &options)
        .map_err(|e| Error::Internal(format!("the report's SVG does not parse: {e}")))?;
    let size = tree.size().to_int_size();
    let mut pixmap = resvg::tiny_skia::Pixmap::new(size.width(), size.height())
        .ok_or_else(|| Error::Internal("the report has an empty size".into()))?;
    resvg::render(
        &tree,
        resvg::tiny_skia::Transform::default(),
        &mut pixmap.as_mut(),
    );
    pixmap
        .encode_png()
        .map_err(|e| Error::Internal(format!("encoding the PNG failed: {e}")))
}

/// Escapes text for HTML.
pub fn escape_html(text: &str) -> String {
    let mut out = String::with_capacity(text.len());
    for c in text.chars() {
        match c {
            '&' => out.push_str("&amp;"),
            '<' => out.push_str("&lt;"),
            '>' => out.push_str("&gt;"),
            '"' => out.push_str("&quot;"),
            '\'' => out.push_str("&#39;"),
            c => out.push(c),
        }
    }
    out
}

fn html(data: &ReportData, svg: &str) -> String {
    // The SVG's own XML declaration does not belong inside HTML.
    let svg = svg
        .strip_prefix("<?xml version=\"1.0\" encoding=\"UTF-8\"?>")
        .unwrap_or(svg)
        .trim_start();
    let mut page = String::new();
    let _ = write!(
        page,
        "<!doctype html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n\
         <title>{name}: holdout report</title>\n<style>body{{font-family:sans-serif;\
         max-width:1040px;margin:2em auto;color:#222}}p{{line-height:1.45}}</style>\n</head>\n\
         <body>\n<h1>{name}</h1>\n<p>{answers} and {refusals} on {rows} rows \
         (delta {delta}, tolerance &plusmn;{tol}).</p>\n{svg}\n",
        name = escape_html(&data.holdout),
        answers = count(data.answers.len(), "answer", "answers"),
        refusals = count(data.refusals.len(), "refusal", "refusals"),
        rows = data.rows,
        delta = data.delta,
        tol = data.tolerance,
    );
    for line in data.guarantee.lines() {
        let _ = writeln!(page, "<p>{}</p>", escape_html(line));
    }
    page.push_str("</body>\n</html>\n");
    page
}

#[cfg(test)]
mod tests {
    use super::*;

    fn sample() -> ReportData {
        let mut answers = Vec::new();
        for q in 1..=6u64 {
            answers.push(AnswerPoint {
                query: q,
                team: if q % 2 == 0 { "red" } else { "blue" }.into(),
                value: Some(0.3 - 0.01 * q as f64),
                lower: 0.25 - 0.015 * q as f64,
                upper: 0.35 - 0.005 * q as f64,
                spent: q as f64 / 8.0,
                transcript_nats: 4.6 * q as f64,
                next_half_width: 0.02 + 0.004 * q as f64,
            });
        }
        ReportData {
            holdout: "sample".into(),
            rows: 1000,
            delta: 0.05,
            tolerance: 0.05,
            answers,
            refusals: vec![6],
            guarantee: "With probability at least 1 - 0.05 <every> interval & more.".into(),
        }
    }

    #[test]
    fn the_svg_has_one_point_per_answer_and_parses() {
        let data = sample();
        let svg = svg(&data).unwrap();
        assert_eq!(svg.matches("<circle").count(), data.answers.len());
        let options = resvg::usvg::Options::default();
        resvg::usvg::Tree::from_str(&svg, &options).expect("the SVG parses");
        // Text is escaped.
        assert!(svg.contains("&lt;every&gt;"), "{svg}");
    }

    #[test]
    fn the_png_decodes_at_the_picture_size() {
        let bytes = render(&sample(), Format::Png).unwrap();
        let pixmap = resvg::tiny_skia::Pixmap::decode_png(&bytes).expect("a PNG");
        assert_eq!((pixmap.width(), pixmap.height()), size(&sample()));
        // Not blank: some pixels are dark (text, lines).
        let dark = pixmap
            .pixels()
            .iter()
            .filter(|p| p.red() < 100 && p.green() < 100 && p.blue() < 100)
            .count();
        assert!(dark > 1000, "{dark} dark pixels");
    }

    #[test]
    fn the_html_page_escapes_text_and_holds_the_chart() {
        let page = String::from_utf8(render(&sample(), Format::Html).unwrap()).unwrap();
        assert!(page.starts_with("<!doctype html>"));
        assert_eq!(page.matches("<circle").count(), 6);
        assert!(page.contains("&lt;every&gt; interval &amp; more"));
        assert!(!page.contains("<every>"));
    }

    #[test]
    fn the_extension_names_the_format() {
        use std::path::Path;
        assert_eq!(Format::from_path(Path::new("a.SVG")).unwrap(), Format::Svg);
        assert_eq!(Format::from_path(Path::new("a.png")).unwrap(), Format::Png);
        assert_eq!(Format::from_path(Path::new("a.htm")).unwrap(), Format::Html);
        assert!(Format::from_path(Path::new("a.pdf")).is_err());
    }

    #[test]
    fn every_line_of_the_guarantee_fits_under_the_charts() {
        let mut data = sample();
        let short = size(&data).1;
        data.guarantee = (0..20)
            .map(|i| format!("line {i}"))
            .collect::<Vec<_>>()
            .join("\n");
        let (_, tall) = size(&data);
        assert!(tall > short);
        // The last line's baseline lies inside the picture.
        let charts = TITLE_HEIGHT + INTERVALS_HEIGHT + BURN_HEIGHT;
        assert!(charts + 10 + LINE_HEIGHT * 19 + 13 <= tall, "{tall}");
    }

    /// Query numbers on the x axes are whole and none repeats within an axis (fractional ticks
    /// formatted without decimals once read "0 0 1 2 2 2").
    #[test]
    fn query_ticks_are_whole_and_distinct() {
        for answers in [3u64, 6, 40, 500] {
            let mut data = sample();
            data.refusals.clear();
            data.answers = (1..=answers)
                .map(|q| AnswerPoint {
                    query: q,
                    ..data.answers[0].clone()
                })
                .collect();
            let svg = svg(&data).unwrap();
            let mut counts = std::collections::BTreeMap::<String, usize>::new();
            for piece in svg.split("<text").skip(1) {
                let Some(start) = piece.find('>') else {
                    continue;
                };
                let Some(end) = piece.find("</text>") else {
                    continue;
                };
                let t = piece[start + 1..end].trim();
                if !t.is_empty() && t.chars().all(|c| c.is_ascii_digit()) {
                    *counts.entry(t.to_string()).or_default() += 1;
                }
            }
            // Four charts share the x axis; a label appears at most once on each.
            assert!(counts.len() >= 2, "{answers} answers: ticks {counts:?}");
            assert!(
                counts.values().all(|&c| c <= 4),
                "{answers} answers: a tick repeats: {counts:?}"
            );
        }
    }

    #[test]
    fn long_text_wraps_at_spaces() {
        let lines = wrap("aaa bbb ccc ddd", 7);
        assert_eq!(lines, ["aaa bbb", "ccc ddd"]);
    }
}
