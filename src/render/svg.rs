//! Small inline SVG charts for the report. No numerics beyond placing marks.
//!
//! Colours follow the Okabe–Ito palette (readable by colour-blind readers); every series
//! also has its own marker shape or dash pattern and a direct label, so charts stay readable
//! in greyscale and in print.

use std::fmt::Write as _;

/// Okabe–Ito colours; aligned cluster k uses `PALETTE[(k - 1) % len]`.
pub const PALETTE: [&str; 8] = [
    "#0072B2", "#E69F00", "#009E73", "#CC79A7", "#D55E00", "#56B4E9", "#F0E442", "#000000",
];

/// Colour of aligned cluster `k` (1-based).
pub fn cluster_colour(k: usize) -> &'static str {
    PALETTE[(k.max(1) - 1) % PALETTE.len()]
}

/// Colours for placements (no yellow: too faint on white for lines).
pub const PLACEMENT_COLOURS: [&str; 5] = ["#D55E00", "#56B4E9", "#000000", "#CC79A7", "#009E73"];

/// Dash pattern of series `i`.
pub fn dash(i: usize) -> &'static str {
    ["", "6 3", "2 3", "8 3 2 3", "1 2"][i % 5]
}

/// Escape text for HTML and SVG.
pub fn esc(s: &str) -> String {
    let mut out = String::with_capacity(s.len());
    for c in s.chars() {
        match c {
            '&' => out.push_str("&amp;"),
            '<' => out.push_str("&lt;"),
            '>' => out.push_str("&gt;"),
            '"' => out.push_str("&quot;"),
            '\'' => out.push_str("&#39;"),
            _ => out.push(c),
        }
    }
    out
}

/// A marker of shape `i` at (x, y).
pub fn marker(i: usize, x: f64, y: f64, fill: &str) -> String {
    let r = 4.5;
    match i % 5 {
        0 => format!(r##"<circle cx="{x:.1}" cy="{y:.1}" r="{r}" fill="{fill}" stroke="#000" stroke-width="0.8"/>"##),
        1 => format!(
            r##"<rect x="{:.1}" y="{:.1}" width="{}" height="{}" fill="{fill}" stroke="#000" stroke-width="0.8"/>"##,
            x - r,
            y - r,
            2.0 * r,
            2.0 * r
        ),
        2 => format!(
            r##"<path d="M{x:.1},{:.1} L{:.1},{:.1} L{:.1},{:.1} Z" fill="{fill}" stroke="#000" stroke-width="0.8"/>"##,
            y - r - 1.0,
            x + r + 1.0,
            y + r,
            x - r - 1.0,
            y + r
        ),
        3 => format!(
            r##"<path d="M{x:.1},{:.1} L{:.1},{y:.1} L{x:.1},{:.1} L{:.1},{y:.1} Z" fill="{fill}" stroke="#000" stroke-width="0.8"/>"##,
            y - r - 1.0,
            x + r + 1.0,
            y + r + 1.0,
            x - r - 1.0
        ),
        _ => format!(
            r##"<path d="M{:.1},{:.1} L{:.1},{:.1} M{:.1},{:.1} L{:.1},{:.1}" stroke="{fill}" stroke-width="2.5"/>"##,
            x - r,
            y - r,
            x + r,
            y + r,
            x - r,
            y + r,
            x + r,
            y - r
        ),
    }
}

/// Nice tick values covering [lo, hi].
pub fn ticks(lo: f64, hi: f64, n: usize) -> Vec<f64> {
    if !(hi > lo) {
        return vec![lo];
    }
    let raw = (hi - lo) / n as f64;
    let mag = 10f64.powf(raw.log10().floor());
    let step = [1.0, 2.0, 2.5, 5.0, 10.0]
        .iter()
        .map(|m| m * mag)
        .find(|s| *s >= raw)
        .unwrap_or(raw);
    let start = (lo / step).ceil() * step;
    let mut out = Vec::new();
    let mut t = start;
    while t <= hi + 1e-9 * step {
        out.push(t);
        t += step;
    }
    out
}

/// A tick label with as many decimals as the ticks' spacing `step` needs, so that
/// neighbouring ticks never read alike (7186.5 and 7187.0, not 7187 and 7187).
fn fmt_tick(v: f64, step: f64) -> String {
    let decimals: usize = (0..=6usize)
        .find(|d| {
            let scaled = step.abs() * 10f64.powi(*d as i32);
            (scaled - scaled.round()).abs() < 1e-6 * scaled.max(1.0)
        })
        .unwrap_or(6);
    format!("{v:.decimals$}")
}

/// The spacing of a tick list (1 for a single tick).
fn step_of(ticks: &[f64]) -> f64 {
    match ticks {
        [a, b, ..] => b - a,
        _ => 1.0,
    }
}

/// One series of a line chart.
pub struct Series {
    /// Legend text.
    pub name: String,
    /// Points.
    pub points: Vec<(f64, f64)>,
    /// Colour.
    pub colour: String,
    /// Marker shape and dash index.
    pub style: usize,
}

/// A line chart with markers, axis labels and a legend below.
pub fn line_chart(title: &str, x_label: &str, y_label: &str, series: &[Series], integer_x: bool) -> String {
    let (w, h) = (640.0, 280.0);
    let (l, r, t, b) = (80.0, 20.0, 10.0, 45.0);
    let legend_h = 18.0 * series.len() as f64 + 6.0;
    let pts = series.iter().flat_map(|s| s.points.iter());
    let (mut x0, mut x1, mut y0, mut y1) = (f64::INFINITY, f64::NEG_INFINITY, f64::INFINITY, f64::NEG_INFINITY);
    for (x, y) in pts {
        x0 = x0.min(*x);
        x1 = x1.max(*x);
        y0 = y0.min(*y);
        y1 = y1.max(*y);
    }
    if !x0.is_finite() {
        return String::new();
    }
    if x1 <= x0 {
        x1 = x0 + 1.0;
    }
    if y1 <= y0 {
        y1 = y0 + 1.0;
    }
    let pad = 0.05 * (y1 - y0);
    let frame = Frame {
        w,
        h,
        margins: (l, r, t, b),
        x: (x0, x1),
        y: (y0 - pad, y1 + pad),
    };
    let mut s = String::new();
    // The title is an HTML caption above the chart, so long titles wrap instead of being cut.
    let _ = write!(s, r#"<p class="cap">{}</p>"#, esc(title));
    let _ = write!(
        s,
        r#"<svg xmlns="http://www.w3.org/2000/svg" viewBox="0 0 {w} {}" role="img" aria-label="{}" class="chart">"#,
        h + legend_h,
        esc(title)
    );
    frame.axes(&mut s, x_label, y_label, integer_x);
    frame.lines(&mut s, series);
    s.push_str("</svg>");
    s
}

/// The plotting area of a line chart: its size, margins (left, right, top, bottom) and
/// the ranges of x and y it shows.
struct Frame {
    w: f64,
    h: f64,
    margins: (f64, f64, f64, f64),
    x: (f64, f64),
    y: (f64, f64),
}

impl Frame {
    fn sx(&self, x: f64) -> f64 {
        let (l, r, _, _) = self.margins;
        l + (x - self.x.0) / (self.x.1 - self.x.0) * (self.w - l - r)
    }

    fn sy(&self, y: f64) -> f64 {
        let (_, _, t, b) = self.margins;
        t + (1.0 - (y - self.y.0) / (self.y.1 - self.y.0)) * (self.h - t - b)
    }

    /// The frame, grid lines, ticks and axis labels.
    fn axes(&self, s: &mut String, x_label: &str, y_label: &str, integer_x: bool) {
        let (w, h) = (self.w, self.h);
        let (l, r, t, b) = self.margins;
        let _ = write!(
            s,
            r##"<rect x="{l}" y="{t}" width="{}" height="{}" fill="none" stroke="#999"/>"##,
            w - l - r,
            h - t - b
        );
        let yt = ticks(self.y.0, self.y.1, 5);
        let y_step = step_of(&yt);
        for v in yt {
            let y = self.sy(v);
            let _ = write!(
                s,
                r##"<line x1="{l}" x2="{}" y1="{y:.1}" y2="{y:.1}" stroke="#ddd"/><text x="{}" y="{:.1}" class="tk" text-anchor="end">{}</text>"##,
                w - r,
                l - 6.0,
                y + 4.0,
                fmt_tick(v, y_step)
            );
        }
        let (x0, x1) = self.x;
        let xt: Vec<f64> = if integer_x {
            (x0.round() as i64..=x1.round() as i64).map(|v| v as f64).collect()
        } else {
            ticks(x0, x1, 6)
        };
        let x_step = step_of(&xt);
        for v in xt {
            let x = self.sx(v);
            let _ = write!(
                s,
                r#"<text x="{x:.1}" y="{}" class="tk" text-anchor="middle">{}</text>"#,
                h - b + 16.0,
                fmt_tick(v, x_step)
            );
        }
        let _ = write!(
            s,
            r#"<text x="{}" y="{}" class="tk" text-anchor="middle">{}</text>"#,
            (l + w - r) / 2.0,
            h - 8.0,
            esc(x_label)
        );
        let _ = write!(
            s,
            r#"<text x="14" y="{}" class="tk" text-anchor="middle" transform="rotate(-90 14 {})">{}</text>"#,
            (t + h - b) / 2.0,
            (t + h - b) / 2.0,
            esc(y_label)
        );
    }

    /// Each series' line and markers, then the legend below the frame.
    fn lines(&self, s: &mut String, series: &[Series]) {
        let (l, _, _, _) = self.margins;
        for se in series {
            let path: Vec<String> = se
                .points
                .iter()
                .map(|(x, y)| format!("{:.1},{:.1}", self.sx(*x), self.sy(*y)))
                .collect();
            let _ = write!(
                s,
                r#"<polyline points="{}" fill="none" stroke="{}" stroke-width="2" stroke-dasharray="{}"/>"#,
                path.join(" "),
                se.colour,
                dash(se.style)
            );
            // Many points: a marker every fifth one keeps the line readable.
            let every = if se.points.len() > 12 { 5 } else { 1 };
            for (x, y) in se.points.iter().step_by(every) {
                s.push_str(&marker(se.style, self.sx(*x), self.sy(*y), &se.colour));
            }
        }
        for (i, se) in series.iter().enumerate() {
            let y = self.h + 12.0 + 18.0 * i as f64;
            let _ = write!(
                s,
                r#"<line x1="{l}" x2="{}" y1="{y}" y2="{y}" stroke="{}" stroke-width="2" stroke-dasharray="{}"/>"#,
                l + 30.0,
                se.colour,
                dash(se.style)
            );
            s.push_str(&marker(se.style, l + 15.0, y, &se.colour));
            let _ = write!(
                s,
                r#"<text x="{}" y="{}" class="tk">{}</text>"#,
                l + 38.0,
                y + 4.0,
                esc(&se.name)
            );
        }
    }
}

/// Horizontal 100% stacked bars: one bar per row label, segments (cluster, share).
pub fn stacked_shares(title: &str, rows: &[(String, Vec<(usize, f64)>)]) -> String {
    let w = 640.0;
    let l = 230.0;
    let bar = 26.0;
    let h = 40.0 + rows.len() as f64 * (bar + 12.0);
    let mut s = String::new();
    open_svg(&mut s, (w, h), title, "chart", Some((10.0, 18.0, "ct", usize::MAX)));
    for (i, (label, segs)) in rows.iter().enumerate() {
        let y = 32.0 + i as f64 * (bar + 12.0);
        let lines = wrap(label, 34, 2);
        let first = y + bar / 2.0 + 4.0 - 6.0 * (lines.len() as f64 - 1.0);
        text_lines(&mut s, l - 8.0, first, &lines, "tk", "end");
        let mut x = l;
        for (k, share) in segs {
            let width = share * (w - l - 10.0);
            let fill = cluster_colour(*k);
            let _ = write!(
                s,
                r##"<rect x="{x:.1}" y="{y}" width="{width:.1}" height="{bar}" fill="{fill}" stroke="#fff" stroke-width="1"/>"##
            );
            // The label that fits the segment: number and share, else the number alone,
            // else none (the table below the chart has every share).
            let full = format!("{k} · {:.0}%", 100.0 * share);
            let label = [full, k.to_string()]
                .into_iter()
                .find(|t| tick_text_width(t) + 6.0 <= width);
            if let Some(label) = label {
                let text_fill = if matches!(*k % PALETTE.len(), 2 | 7) {
                    "#000"
                } else {
                    "#fff"
                };
                let _ = write!(
                    s,
                    r#"<text x="{:.1}" y="{}" class="tk" fill="{text_fill}" text-anchor="middle">{label}</text>"#,
                    x + width / 2.0,
                    y + bar / 2.0 + 4.0,
                );
            }
            x += width;
        }
    }
    s.push_str("</svg>");
    s
}

/// One row of the cluster-count chart: a placement, its probability at each count of the
/// chart (None where the count was not fitted), and the count it was compared at.
pub type CountRow = (String, Vec<Option<f64>>, usize);

/// How sure the criteria are of the cluster count: one row per placement, one cell per
/// count, each cell a bar whose height is the count's approximate probability, written
/// above it (to 3 decimals, as in the criteria table; "<0.001" for less); the compared
/// count's cell is framed.
pub fn count_probabilities(title: &str, counts: &[usize], rows: &[CountRow]) -> String {
    let labels: Vec<Vec<String>> = rows.iter().map(|r| wrap(&r.0, 30, 3)).collect();
    let longest = labels.iter().flatten().map(|t| tick_text_width(t)).fold(0.0, f64::max);
    let l = (longest + 16.0).max(80.0);
    let cell = 58.0;
    let (top, row_h, bar_max, bar_w) = (52.0, 56.0, 30.0, 26.0);
    let axis = "number of clusters (framed: the count each placement is compared at)";
    let w = (l + cell * counts.len().max(1) as f64 + 10.0).max(tick_text_width(axis) + 20.0);
    let h = top + row_h * rows.len() as f64 + 30.0;
    let mut s = String::new();
    let _ = write!(
        s,
        r#"<svg xmlns="http://www.w3.org/2000/svg" viewBox="0 0 {w} {h}" width="{w}" role="img" aria-label="{}" class="split">"#,
        esc(title)
    );
    for (i, line) in wrap(title, ((w - 20.0) / 8.6) as usize, 2).iter().enumerate() {
        let _ = write!(
            s,
            r#"<text x="10" y="{}" class="ct">{}</text>"#,
            18.0 + 17.0 * i as f64,
            esc(line)
        );
    }
    for (j, g) in counts.iter().enumerate() {
        let _ = write!(
            s,
            r#"<text x="{:.1}" y="{}" class="tk" text-anchor="middle">{g}</text>"#,
            l + cell * (j as f64 + 0.5),
            top - 4.0
        );
    }
    for (i, ((_, probabilities, chosen), lines)) in rows.iter().zip(&labels).enumerate() {
        let y0 = top + row_h * i as f64;
        let base = y0 + row_h - 10.0;
        let first = base - 8.0 - 6.0 * (lines.len() as f64 - 1.0);
        text_lines(&mut s, l - 8.0, first, lines, "tk", "end");
        let colour = PLACEMENT_COLOURS[i % PLACEMENT_COLOURS.len()];
        let _ = write!(
            s,
            r##"<line x1="{l}" x2="{:.1}" y1="{base}" y2="{base}" stroke="#999"/>"##,
            l + cell * counts.len() as f64
        );
        for (j, (g, p)) in counts.iter().zip(probabilities).enumerate() {
            let cx = l + cell * (j as f64 + 0.5);
            if g == chosen {
                let _ = write!(
                    s,
                    r##"<rect x="{:.1}" y="{:.1}" width="{:.1}" height="{:.1}" fill="none" stroke="#333" stroke-width="1.2"/>"##,
                    cx - cell / 2.0 + 3.0,
                    y0 + 2.0,
                    cell - 6.0,
                    row_h - 4.0
                );
            }
            let Some(p) = p else {
                let _ = write!(
                    s,
                    r##"<text x="{cx:.1}" y="{:.1}" class="tk" fill="#777" text-anchor="middle">–</text>"##,
                    base - 4.0
                );
                continue;
            };
            let height = (p * bar_max).max(0.0);
            let _ = write!(
                s,
                r#"<rect x="{:.1}" y="{:.1}" width="{bar_w}" height="{height:.1}" fill="{colour}"/>"#,
                cx - bar_w / 2.0,
                base - height
            );
            let value = if *p < 0.0005 {
                "<0.001".to_string()
            } else {
                format!("{p:.3}")
            };
            let weight = if g == chosen { "600" } else { "400" };
            let _ = write!(
                s,
                r#"<text x="{cx:.1}" y="{:.1}" class="tk" font-weight="{weight}" text-anchor="middle">{}</text>"#,
                base - height - 4.0,
                esc(&value)
            );
        }
    }
    let _ = write!(
        s,
        r#"<text x="{:.1}" y="{:.1}" class="tk" text-anchor="middle">{axis}</text>"#,
        w / 2.0,
        h - 8.0
    );
    s.push_str("</svg>");
    s
}

/// One column of a split diagram: a cluster count and its clusters (number, weight).
pub type SplitColumn = (usize, Vec<(usize, f64)>);

/// How clusters split as the count grows: one column per count, each cluster a bar whose
/// height is its share, and bands from each cluster to the clusters its rows go to at the
/// next count (bands under 2% of the rows are left out). `flows[j][a][b]` is the weight
/// going from column j's cluster a to column j + 1's cluster b; `chosen` is the compared
/// count, whose header is marked.
pub fn split_diagram(title: &str, columns: &[SplitColumn], flows: &[Vec<Vec<f64>>], chosen: usize) -> String {
    let n = columns.len().max(1);
    let (l, r, t, plot_h) = (30.0, 64.0, 52.0, 300.0);
    let bar = 16.0;
    let w = (l + r + 130.0 * (n as f64 - 1.0) + bar).max(300.0);
    let h = t + plot_h + 20.0;
    let gap = 6.0;
    let x_of = |j: usize| l + (w - l - r - bar) * j as f64 / (n as f64 - 1.0).max(1.0);
    // Each cluster's top and height, column by column.
    let layout: Vec<Vec<(f64, f64)>> = columns
        .iter()
        .map(|(_, clusters)| {
            let total: f64 = clusters.iter().map(|c| c.1).sum::<f64>().max(f64::MIN_POSITIVE);
            let room = plot_h - gap * (clusters.len() as f64 - 1.0);
            let mut y = t;
            clusters
                .iter()
                .map(|(_, weight)| {
                    let height = room * weight / total;
                    let top = y;
                    y += height + gap;
                    (top, height)
                })
                .collect()
        })
        .collect();
    let mut s = String::new();
    let _ = write!(
        s,
        r#"<svg xmlns="http://www.w3.org/2000/svg" viewBox="0 0 {w} {h}" width="{w}" role="img" aria-label="{}" class="split">"#,
        esc(title)
    );
    text_lines(
        &mut s,
        4.0,
        16.0,
        &wrap(title, ((w - 8.0) / 7.6) as usize, 2),
        "ct",
        "start",
    );
    for (j, (count, _)) in columns.iter().enumerate() {
        let label = if *count == chosen {
            format!("{count} (compared)")
        } else {
            count.to_string()
        };
        let weight = if *count == chosen { "bold" } else { "normal" };
        let _ = write!(
            s,
            r#"<text x="{:.1}" y="{}" class="tk" font-weight="{weight}" text-anchor="middle">{}</text>"#,
            x_of(j) + bar / 2.0,
            t - 8.0,
            esc(&label)
        );
    }
    // Bands first, under the bars.
    for (j, flow) in flows.iter().enumerate().take(n - 1) {
        let total: f64 = flow.iter().flatten().sum::<f64>().max(f64::MIN_POSITIVE);
        let (from, to) = (&layout[j], &layout[j + 1]);
        let from_total: Vec<f64> = flow
            .iter()
            .map(|row| row.iter().sum::<f64>().max(f64::MIN_POSITIVE))
            .collect();
        let to_total: Vec<f64> = (0..to.len())
            .map(|b| flow.iter().map(|row| row[b]).sum::<f64>().max(f64::MIN_POSITIVE))
            .collect();
        let mut out_at: Vec<f64> = from.iter().map(|f| f.0).collect();
        let mut in_at: Vec<f64> = to.iter().map(|f| f.0).collect();
        let (x0, x1) = (x_of(j) + bar, x_of(j + 1));
        let mid = (x0 + x1) / 2.0;
        for (a, row) in flow.iter().enumerate() {
            for (b, v) in row.iter().enumerate() {
                let out_h = from[a].1 * v / from_total[a];
                let in_h = to[b].1 * v / to_total[b];
                let (ya, yb) = (out_at[a], in_at[b]);
                out_at[a] += out_h;
                in_at[b] += in_h;
                if v / total < 0.02 {
                    continue;
                }
                let k = columns[j].1[a].0;
                let _ = write!(
                    s,
                    r#"<path d="M{x0:.1},{ya:.1} C{mid:.1},{ya:.1} {mid:.1},{yb:.1} {x1:.1},{yb:.1} L{x1:.1},{:.1} C{mid:.1},{:.1} {mid:.1},{:.1} {x0:.1},{:.1} Z" fill="{}" fill-opacity="0.35" stroke="none"/>"#,
                    yb + in_h,
                    yb + in_h,
                    ya + out_h,
                    ya + out_h,
                    cluster_colour(k)
                );
            }
        }
    }
    for (j, (_, clusters)) in columns.iter().enumerate() {
        let total: f64 = clusters.iter().map(|c| c.1).sum::<f64>().max(f64::MIN_POSITIVE);
        for ((k, weight), (top, height)) in clusters.iter().zip(&layout[j]) {
            let x = x_of(j);
            let _ = write!(
                s,
                r##"<rect x="{x:.1}" y="{top:.1}" width="{bar}" height="{:.1}" fill="{}" stroke="#333" stroke-width="0.5"/>"##,
                height.max(0.5),
                cluster_colour(*k)
            );
            if *height >= 12.0 {
                let _ = write!(
                    s,
                    r#"<text x="{:.1}" y="{:.1}" class="tk">{k} · {:.0}%</text>"#,
                    x + bar + 3.0,
                    top + height / 2.0 + 4.0,
                    100.0 * weight / total
                );
            }
        }
    }
    s.push_str("</svg>");
    s
}

/// A shaded grid: cells shaded by their share of the row, with counts written in.
pub fn shaded_grid(
    title: &str,
    row_title: &str,
    col_title: &str,
    rows: &[usize],
    cols: &[usize],
    counts: &[Vec<usize>],
) -> String {
    let cell = 46.0;
    let l = 110.0;
    let w = (l + cell * cols.len() as f64 + 20.0).max(300.0);
    let chars = ((w - 8.0) / 6.2) as usize;
    // The title and the two placements' names, wrapped to the grid's width.
    let mut header: Vec<String> = wrap(title, chars, 3);
    header.extend(wrap(&format!("rows: {row_title}"), chars, 2));
    header.extend(wrap(&format!("columns: {col_title}"), chars, 2));
    let t = 16.0 + 12.0 * header.len() as f64 + 18.0;
    let h = t + cell * rows.len() as f64 + 20.0;
    let mut s = String::new();
    let _ = write!(
        s,
        r#"<svg xmlns="http://www.w3.org/2000/svg" viewBox="0 0 {w} {h}" width="{w}" role="img" aria-label="{}" class="grid">"#,
        esc(title)
    );
    text_lines(&mut s, 4.0, 16.0, &header, "tk", "start");
    for (j, c) in cols.iter().enumerate() {
        let _ = write!(
            s,
            r#"<text x="{:.1}" y="{}" class="tk" text-anchor="middle">{c}</text>"#,
            l + cell * (j as f64 + 0.5),
            t - 6.0
        );
    }
    for (i, r) in rows.iter().enumerate() {
        let total: usize = counts[i].iter().sum();
        let y = t + cell * i as f64;
        let _ = write!(
            s,
            r#"<text x="{}" y="{:.1}" class="tk" text-anchor="end">cluster {r}</text>"#,
            l - 6.0,
            y + cell / 2.0 + 4.0
        );
        for (j, n) in counts[i].iter().enumerate() {
            let share = if total > 0 { *n as f64 / total as f64 } else { 0.0 };
            let grey = (255.0 - 200.0 * share).round() as u8;
            let x = l + cell * j as f64;
            let ink = if share > 0.55 { "#fff" } else { "#000" };
            let _ = write!(
                s,
                r##"<rect x="{x:.1}" y="{y:.1}" width="{cell}" height="{cell}" fill="rgb({grey},{grey},{grey})" stroke="#888"/>"##
            );
            let _ = write!(
                s,
                r#"<text x="{:.1}" y="{:.1}" class="tk" fill="{ink}" text-anchor="middle">{n}</text>"#,
                x + cell / 2.0,
                y + cell / 2.0 + 4.0
            );
        }
    }
    s.push_str("</svg>");
    s
}

/// Small bar chart of a 10-bin histogram on [0, 1].
pub fn histogram(title: &str, bins: &[f64]) -> String {
    let (w, h) = (300.0, 170.0);
    let (b, t) = (30.0, 26.0);
    let peak = bins.iter().copied().fold(0.0, f64::max);
    let mut marks = ticks(0.0, peak.max(1.0), 3);
    let step = step_of(&marks);
    if let Some(last) = marks.last().copied().filter(|last| *last < peak) {
        marks.push(last + step);
    }
    let top = marks.last().copied().unwrap_or(1.0).max(peak).max(f64::MIN_POSITIVE);
    let labels: Vec<String> = marks.iter().map(|m| fmt_tick(*m, step)).collect();
    let l = 24.0 + labels.iter().map(|x| tick_text_width(x)).fold(0.0, f64::max);
    let bw = (w - l - 10.0) / bins.len().max(1) as f64;
    let y_of = |v: f64| h - b - v / top * (h - t - b);
    let mut s = String::new();
    open_svg(&mut s, (w, h), title, "small", Some((4.0, 16.0, "tk", 44)));
    for (m, label) in marks.iter().zip(&labels) {
        let y = y_of(*m);
        let _ = write!(
            s,
            r##"<line x1="{l:.1}" x2="{:.1}" y1="{y:.1}" y2="{y:.1}" stroke="#ddd"/><text x="{:.1}" y="{:.1}" class="tk" text-anchor="end">{label}</text>"##,
            w - 10.0,
            l - 4.0,
            y + 4.0
        );
    }
    let _ = write!(
        s,
        r#"<text x="10" y="{0:.1}" class="tk" text-anchor="middle" transform="rotate(-90 10 {0:.1})">rows (weighted)</text>"#,
        (t + h - b) / 2.0
    );
    for (i, v) in bins.iter().enumerate() {
        let bh = v / top * (h - t - b);
        let x = l + i as f64 * bw;
        let _ = write!(
            s,
            r##"<rect x="{x:.1}" y="{:.1}" width="{:.1}" height="{bh:.1}" fill="#0072B2" stroke="#fff"/>"##,
            h - b - bh,
            bw - 1.0
        );
    }
    let half = bins.len() as f64 / 2.0;
    for (i, lab) in ["0", "0.5", "1"].iter().enumerate() {
        let _ = write!(
            s,
            r#"<text x="{:.1}" y="{}" class="tk" text-anchor="middle">{lab}</text>"#,
            l + i as f64 * half * bw,
            h - b + 14.0
        );
    }
    let _ = write!(
        s,
        r#"<text x="{}" y="{}" class="tk" text-anchor="middle">largest posterior per row</text>"#,
        (l + w) / 2.0,
        h - 4.0
    );
    s.push_str("</svg>");
    s
}

/// One mark of a dot chart: marker style, value, and its 95% interval when it has one.
pub type DotMark = (usize, f64, Option<(f64, f64)>);

/// One row of a dot chart: label, colour, and its marks.
pub type DotRow = (String, &'static str, Vec<DotMark>);

/// Width in px of `text` at the charts' tick size (11 px), a generous estimate (0.56 em
/// per character) so that labels laid out by it are not cut.
pub fn tick_text_width(text: &str) -> f64 {
    6.2 * text.chars().count() as f64
}

/// Dot rows: for each row label, markers (style, value) on a shared axis, each with a line
/// across its interval when it has one. The label column
/// is as wide as the longest label, and markers of different styles (placements) sit a
/// little apart vertically, so that equal values do not hide each other.
pub fn dot_rows(title: &str, rows: &[DotRow], lo: f64, hi: f64) -> String {
    let longest = rows.iter().map(|r| tick_text_width(&r.0)).fold(0.0, f64::max);
    let l = (longest + 12.0).max(60.0);
    let plot = 220.0;
    let w = l + plot + 14.0;
    let styles = rows.iter().flat_map(|r| r.2.iter().map(|m| m.0 + 1)).max().unwrap_or(1);
    let dodge = 5.0;
    let row_h = (10.0 + dodge * styles as f64).max(22.0);
    let h = 44.0 + rows.len() as f64 * row_h;
    let (lo, hi) = if hi > lo { (lo, hi) } else { (lo - 1.0, hi + 1.0) };
    let sx = |v: f64| l + (v - lo) / (hi - lo) * (w - l - 14.0);
    let mut s = String::new();
    let _ = write!(
        s,
        r#"<svg xmlns="http://www.w3.org/2000/svg" viewBox="0 0 {w} {h}" width="{w}" role="img" aria-label="{}" class="dots">"#,
        esc(title)
    );
    let _ = write!(
        s,
        r#"<text x="4" y="16" class="tk">{}</text>"#,
        esc(&truncate(title, ((w - 8.0) / 6.2) as usize))
    );
    for (i, (label, colour, marks)) in rows.iter().enumerate() {
        let y = 30.0 + i as f64 * row_h;
        let _ = write!(
            s,
            r##"<line x1="{l}" x2="{}" y1="{y}" y2="{y}" stroke="#ddd"/>"##,
            w - 14.0
        );
        let _ = write!(
            s,
            r#"<text x="{}" y="{}" class="tk" text-anchor="end">{}</text>"#,
            l - 6.0,
            y + 4.0,
            esc(label)
        );
        for (style, v, interval) in marks {
            let offset = (*style as f64 - (styles as f64 - 1.0) / 2.0) * dodge;
            if let Some((a, b)) = interval {
                let _ = write!(
                    s,
                    r#"<line x1="{:.1}" x2="{:.1}" y1="{:.1}" y2="{:.1}" stroke="{colour}" stroke-width="1.5"/>"#,
                    sx(*a),
                    sx(*b),
                    y + offset,
                    y + offset
                );
            }
            s.push_str(&marker(*style, sx(*v), y + offset, colour));
        }
    }
    let y = h - 8.0;
    let dt = ticks(lo, hi, 3);
    let d_step = step_of(&dt);
    for v in dt {
        let _ = write!(
            s,
            r#"<text x="{:.1}" y="{y}" class="tk" text-anchor="middle">{}</text>"#,
            sx(v),
            fmt_tick(v, d_step)
        );
    }
    s.push_str("</svg>");
    s
}

/// Open an `<svg>` of size (w, h) labelled `title`; optionally write the title inside at
/// (x, y) with a text class, cut to a number of characters.
fn open_svg(s: &mut String, (w, h): (f64, f64), title: &str, class: &str, inner: Option<(f64, f64, &str, usize)>) {
    let _ = write!(
        s,
        r#"<svg xmlns="http://www.w3.org/2000/svg" viewBox="0 0 {w} {h}" role="img" aria-label="{}" class="{class}">"#,
        esc(title)
    );
    if let Some((x, y, text_class, max)) = inner {
        let _ = write!(
            s,
            r#"<text x="{x}" y="{y}" class="{text_class}">{}</text>"#,
            esc(&truncate(title, max))
        );
    }
}

/// Break text at spaces into lines of at most `n` characters, at most `max_lines` of
/// them (the last cut with an ellipsis if the text runs on); a word longer than a line is
/// cut.
pub fn wrap(text: &str, n: usize, max_lines: usize) -> Vec<String> {
    let mut lines: Vec<String> = Vec::new();
    let mut line = String::new();
    for word in text.split_whitespace() {
        let candidate = if line.is_empty() {
            word.to_string()
        } else {
            format!("{line} {word}")
        };
        if candidate.chars().count() <= n || line.is_empty() {
            line = candidate;
        } else {
            lines.push(std::mem::take(&mut line));
            line = word.to_string();
        }
    }
    if !line.is_empty() {
        lines.push(line);
    }
    if lines.len() > max_lines {
        let rest = lines[max_lines - 1..].join(" ");
        lines.truncate(max_lines - 1);
        lines.push(rest);
        let last = lines.pop().unwrap_or_default();
        lines.push(truncate(&last, n));
    }
    lines.into_iter().map(|l| truncate(&l, n)).collect()
}

/// `<text>` lines (11 px apart) starting at baseline y; `anchor` is an SVG text-anchor.
fn text_lines(s: &mut String, x: f64, y: f64, lines: &[String], class: &str, anchor: &str) {
    for (i, line) in lines.iter().enumerate() {
        let _ = write!(
            s,
            r#"<text x="{x:.1}" y="{:.1}" class="{class}" text-anchor="{anchor}">{}</text>"#,
            y + 12.0 * i as f64,
            esc(line)
        );
    }
}

/// Cut text to `n` characters, ending with an ellipsis when cut.
pub fn truncate(s: &str, n: usize) -> String {
    if s.chars().count() <= n {
        s.to_string()
    } else {
        s.chars().take(n - 1).chain(std::iter::once('…')).collect()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn escaping_covers_markup_and_quotes() {
        assert_eq!(
            esc(r#"<script>"a" & 'b'</script>"#),
            "&lt;script&gt;&quot;a&quot; &amp; &#39;b&#39;&lt;/script&gt;"
        );
    }

    #[test]
    fn tick_labels_carry_the_decimals_their_spacing_needs() {
        use super::fmt_tick;
        // Ticks half a unit apart above 1000 keep one decimal (they read alike without it).
        let labels: Vec<String> = [7186.5, 7187.0, 7187.5].iter().map(|v| fmt_tick(*v, 0.5)).collect();
        assert_eq!(labels, ["7186.5", "7187.0", "7187.5"]);
        assert_eq!(fmt_tick(0.25, 0.25), "0.25");
        assert_eq!(fmt_tick(116000.0, 1000.0), "116000");
        assert_eq!(fmt_tick(0.4, 0.2), "0.4");
    }

    #[test]
    fn wrapping_breaks_at_spaces_and_cuts_only_past_its_last_line() {
        let text = "membership by age, sex, exposure; smoking shifts profiles";
        assert_eq!(
            wrap(text, 34, 2),
            ["membership by age, sex, exposure;", "smoking shifts profiles"]
        );
        assert_eq!(wrap(text, 20, 2), ["membership by age,", "sex, exposure; smok…"]);
        assert_eq!(wrap("short", 34, 2), ["short"]);
        assert!(wrap(text, 20, 2).iter().all(|l| l.chars().count() <= 20));
    }

    #[test]
    fn dot_rows_leave_room_for_their_longest_label() {
        let rows: Vec<DotRow> = vec![
            (
                "cluster 1 (preserved function)".into(),
                "#000",
                vec![(0, 1.0, Some((0.5, 1.5))), (1, 1.0, None)],
            ),
            ("cluster 2".into(), "#000", vec![(0, 2.0, None)]),
        ];
        let svg = dot_rows("FEV1 (% predicted)", &rows, 0.0, 3.0);
        // The label column ends 6 px left of the axis, which starts after the label's width.
        let axis = svg
            .split("<line x1=\"")
            .nth(1)
            .and_then(|rest| rest.split('"').next())
            .and_then(|x| x.parse::<f64>().ok())
            .unwrap();
        assert!(
            axis - 6.0 >= tick_text_width("cluster 1 (preserved function)"),
            "{axis}"
        );
        assert!(
            svg.contains(">cluster 1 (preserved function)</text>"),
            "the label is whole"
        );
    }

    #[test]
    fn a_segment_label_is_written_only_where_it_fits() {
        let svg = stacked_shares("t", &[("p".into(), vec![(1, 0.9), (2, 0.05), (3, 0.05 * 0.1)])]);
        assert!(svg.contains(">1 · 90%<"), "{svg}");
        // 5% of the bar is about 20 px: room for the number, not for the share.
        assert!(svg.contains(">2<") && !svg.contains("2 · 5%"), "{svg}");
        assert!(!svg.contains(">3<"), "{svg}");
    }

    #[test]
    fn a_split_diagram_marks_the_compared_count_and_drops_thin_bands() {
        let columns: Vec<SplitColumn> = vec![(1, vec![(1, 100.0)]), (2, vec![(1, 60.0), (2, 40.0)])];
        // 99 rows go to the two clusters; 1 row (1%) would be a band too thin to draw.
        let flows = vec![vec![vec![59.0, 41.0]]];
        let svg = split_diagram("t", &columns, &flows, 2);
        assert!(svg.contains(">2 (compared)<"), "{svg}");
        assert_eq!(svg.matches("<path").count(), 2);
        assert!(svg.contains(">1 · 60%<") && svg.contains(">2 · 40%<"), "{svg}");
        let thin = vec![vec![vec![99.0, 1.0]]];
        assert_eq!(split_diagram("t", &columns, &thin, 2).matches("<path").count(), 1);
    }

    #[test]
    fn ticks_are_round() {
        let t = ticks(0.0, 1.0, 5);
        assert_eq!(t.len(), 6);
        assert!((t[0] - 0.0).abs() < 1e-12 && (t[5] - 1.0).abs() < 1e-12);
    }
}
