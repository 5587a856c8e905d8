//! Heatmaps of where a `scores` or `probs` output is wrong: standalone SVG images of the
//! per-element error over tolerance, one panel per head.
//!
//! Each panel has queries `i` down the rows and keys `j` across the columns, in the
//! `[memory ; current]` order of docs/conventions.md, so a vertical line at `j = M` separates
//! the memory keys from the current segment's keys. Typical bugs have typical shapes:
//! a wrong memory offset lights up the memory columns, an off-by-one shift a diagonal
//! band, a leaky mask the upper-right triangle.
//!
//! Design:
//! - *Colour*: a ratio at most 1 (within budget) is a neutral light grey; ratios above 1
//!   go through at most six log-scale bins from pale straw to deep wine, with bin edges
//!   on the 1-2-5 sequence (or whole decades for large errors) so the legend reads in
//!   round numbers; an infinite ratio (a leaking masked entry, a non-finite value) is
//!   cobalt blue, a hue the ramp never reaches.
//! - *Size*: at most [`MAX_PANELS`] heads are drawn (those with the largest errors,
//!   in head order, and the image says so); the panels together draw at most
//!   [`CELL_BUDGET`] cells, each the largest ratio of its block of elements, so a map of
//!   any size stays well under 200 KB. Blocks never straddle `j = M`: memory and current
//!   keys are divided separately, so an error confined to memory stays sharp.
//! - *Compactness*: cells of one colour are merged along rows and drawn as one path per
//!   colour, in block coordinates scaled into place.

use std::fmt::Write as _;

use ndarray::{Axis, Ix3};

use super::junit::escape;
use crate::compare::{CaseReport, OutputReport};

/// Most heads drawn in one image.
pub const MAX_PANELS: usize = 8;

/// Most cells drawn over all panels of one image.
pub const CELL_BUDGET: usize = 8000;

/// Panels per row of the image.
const PANEL_COLUMNS: usize = 4;
/// Largest edge of a cell, and of a plot, in pixels.
const CELL_PX: f64 = 16.0;
const PLOT_MAX_PX: f64 = 320.0;
const PLOT_MIN_WIDTH: f64 = 112.0;
// Tall enough for the rotated "query index i" label even when L = 1.
const PLOT_MIN_HEIGHT: f64 = 80.0;
/// Space around a plot inside its panel: room for the head title and boundary label
/// above, tick labels and the axis title below and to the left.
const PLOT_LEFT: f64 = 54.0;
const PLOT_TOP: f64 = 38.0;
const PLOT_RIGHT: f64 = 18.0;
const PLOT_BOTTOM: f64 = 42.0;
const PAGE_PAD: f64 = 12.0;

const WITHIN_BUDGET: &str = "#eceff2";
const INFINITE: &str = "#1d4fb8";
const FRAME: &str = "#7d848e";
const INK: &str = "#20242a";
const BOUNDARY: &str = "#0d7a5f";
/// Ramp anchors for bins above budget: pale straw, burnt orange, deep wine.
const RAMP: [(f64, [u8; 3]); 3] = [
    (0.0, [0xf4, 0xe2, 0xa6]),
    (0.5, [0xe0, 0x7a, 0x38]),
    (1.0, [0x76, 0x1c, 0x3c]),
];

/// A standalone SVG heatmap of `output`'s error map (`[H, L, K]` ratios of error to
/// tolerance, infinite for leaks and non-finite values), labelled with `case`'s id and
/// memory length; `None` when the output has no error map (or one that is not a
/// non-empty `[H, L, K]` array).
///
/// The caller decides which outputs deserve an image (typically the failing ones); a
/// passing output renders as an all-neutral map.
pub fn heatmap(case: &CaseReport, output: &OutputReport) -> Option<String> {
    let map = output
        .error_map
        .as_ref()?
        .view()
        .into_dimensionality::<Ix3>()
        .ok()?;
    if map.is_empty() {
        return None;
    }
    let (heads, queries, keys) = (map.shape()[0], map.shape()[1], map.shape()[2]);
    // A memory length that leaves no current keys cannot belong to this map; drawing
    // no boundary is better than drawing a wrong one.
    let memory = if case.memory_len < keys {
        case.memory_len
    } else {
        0
    };

    // NaN cannot come out of the comparison, but a hand-made map might hold one; it is
    // drawn as infinite rather than silently as "within budget".
    let ratio = |x: f64| if x.is_nan() { f64::INFINITY } else { x };
    let head_max: Vec<f64> = map
        .axis_iter(Axis(0))
        .map(|head| head.iter().map(|&x| ratio(x)).fold(0.0, f64::max))
        .collect();
    let shown = heads_to_show(&head_max);
    let grid = Grid::new(queries, keys, memory, CELL_BUDGET / shown.len());

    let blocks: Vec<Vec<f64>> = shown
        .iter()
        .map(|&h| {
            let mut cells = vec![0.0f64; grid.rows * grid.columns()];
            let head = map.index_axis(Axis(0), h);
            for ((i, j), &x) in head.indexed_iter() {
                let cell = &mut cells[grid.row_of(i) * grid.columns() + grid.column_of(j)];
                *cell = cell.max(ratio(x));
            }
            cells
        })
        .collect();
    let largest_finite = blocks
        .iter()
        .flatten()
        .copied()
        .filter(|x| x.is_finite())
        .fold(0.0, f64::max);
    let scale = Scale::new(largest_finite);

    let (plot_width, plot_height) = plot_size(queries, keys);
    let panel_width = PLOT_LEFT + plot_width + PLOT_RIGHT;
    let panel_height = PLOT_TOP + plot_height + PLOT_BOTTOM;
    let columns = shown.len().min(PANEL_COLUMNS);
    let rows = shown.len().div_ceil(PANEL_COLUMNS);

    let mut header = vec![
        format!(
            "{} of {} elements over budget · L = {queries}, K = {keys} \
             (M = {memory} memory + {} current keys)",
            output.over_budget,
            output.elements,
            keys - memory
        ),
        "colour: error ÷ tolerance, log scale; rows i are queries, columns j keys".to_string(),
    ];
    if grid.downsampled(queries, keys) {
        header.push(format!(
            "downsampled: each cell shows the largest ratio in a block of up to {} × {} elements",
            queries.div_ceil(grid.rows),
            grid.widest_block(keys)
        ));
    }
    if shown.len() < heads {
        header.push(format!(
            "showing {} of {heads} heads (those with the largest errors)",
            shown.len()
        ));
    }

    let header_height = 30.0 + 16.0 * header.len() as f64;
    let legend = legend_items(&scale);
    let legend_width: f64 = legend.iter().map(|(_, label)| item_width(label)).sum();
    let width = (PAGE_PAD * 2.0 + columns as f64 * panel_width)
        .max(PAGE_PAD * 2.0 + legend_width)
        .ceil();
    let legend_top = header_height + rows as f64 * panel_height + 8.0;
    let height = (legend_top + 30.0).ceil();

    let title = format!("{} · {}", case.case, output.name);
    let mut svg = String::new();
    // `write!` into a String cannot fail, hence the ignored results throughout.
    let _ = writeln!(
        svg,
        "<svg xmlns=\"http://www.w3.org/2000/svg\" width=\"{width}\" height=\"{height}\" \
         viewBox=\"0 0 {width} {height}\" font-family=\"sans-serif\" font-size=\"11\" fill=\"{INK}\">"
    );
    let _ = writeln!(svg, "<title>{}</title>", escape(&title));
    let _ = writeln!(
        svg,
        "<rect width=\"100%\" height=\"100%\" fill=\"#ffffff\"/>"
    );
    let _ = writeln!(
        svg,
        "<text x=\"{PAGE_PAD}\" y=\"22\" font-size=\"15\" font-weight=\"bold\">{}</text>",
        escape(&title)
    );
    for (n, line) in header.iter().enumerate() {
        let _ = writeln!(
            svg,
            "<text x=\"{PAGE_PAD}\" y=\"{}\" font-size=\"12\">{}</text>",
            40 + 16 * n,
            escape(line)
        );
    }
    for (p, (&head, cells)) in shown.iter().zip(&blocks).enumerate() {
        let x = PAGE_PAD + (p % PANEL_COLUMNS) as f64 * panel_width;
        let y = header_height + (p / PANEL_COLUMNS) as f64 * panel_height;
        let panel = Panel {
            head,
            largest: head_max[head],
            cells,
            grid: &grid,
            scale: &scale,
            queries,
            keys,
            memory,
            width: plot_width,
            height: plot_height,
        };
        panel.write(&mut svg, x, y);
    }
    write_legend(&mut svg, &scale, &legend, legend_top);
    svg.push_str("</svg>\n");
    Some(svg)
}

/// The heads to draw, in head order: all of them, or the [`MAX_PANELS`] with the
/// largest errors.
fn heads_to_show(head_max: &[f64]) -> Vec<usize> {
    let mut heads: Vec<usize> = (0..head_max.len()).collect();
    if heads.len() > MAX_PANELS {
        heads.sort_by(|&a, &b| head_max[b].total_cmp(&head_max[a]).then(a.cmp(&b)));
        heads.truncate(MAX_PANELS);
        heads.sort_unstable();
    }
    heads
}

/// Pixel size of one plot: square cells where they fit, never a plot so thin or so
/// wide that it stops being legible.
fn plot_size(queries: usize, keys: usize) -> (f64, f64) {
    let per_index = CELL_PX.min(PLOT_MAX_PX / queries.max(keys) as f64);
    (
        (keys as f64 * per_index).max(PLOT_MIN_WIDTH),
        (queries as f64 * per_index).max(PLOT_MIN_HEIGHT),
    )
}

/// How elements are gathered into drawn cells: `rows` row blocks, and the key axis cut
/// into `memory_columns` blocks over `j < M` and `current_columns` over `j >= M`.
struct Grid {
    queries: usize,
    memory: usize,
    current: usize,
    rows: usize,
    memory_columns: usize,
    current_columns: usize,
}

impl Grid {
    fn new(queries: usize, keys: usize, memory: usize, budget: usize) -> Self {
        let budget = budget.max(1);
        let (rows, columns) = if queries * keys <= budget {
            (queries, keys)
        } else {
            let shrink = (budget as f64 / (queries * keys) as f64).sqrt();
            let rows = ((queries as f64 * shrink) as usize).clamp(1, queries);
            let columns = (budget / rows).clamp(1, keys);
            let rows = (budget / columns).clamp(1, queries);
            (rows, columns)
        };
        let current = keys - memory;
        let (memory_columns, current_columns) = if memory == 0 {
            (0, columns.min(current))
        } else {
            let share = (columns as f64 * memory as f64 / keys as f64).round() as usize;
            let memory_columns = share.clamp(1, memory);
            let current_columns = columns.saturating_sub(memory_columns).clamp(1, current);
            (memory_columns, current_columns)
        };
        Grid {
            queries,
            memory,
            current,
            rows,
            memory_columns,
            current_columns,
        }
    }

    fn columns(&self) -> usize {
        self.memory_columns + self.current_columns
    }

    fn row_of(&self, i: usize) -> usize {
        i * self.rows / self.queries
    }

    fn column_of(&self, j: usize) -> usize {
        if j < self.memory {
            j * self.memory_columns / self.memory
        } else {
            self.memory_columns + (j - self.memory) * self.current_columns / self.current
        }
    }

    fn downsampled(&self, queries: usize, keys: usize) -> bool {
        self.rows < queries || self.columns() < keys
    }

    fn widest_block(&self, keys: usize) -> usize {
        let memory = if self.memory_columns > 0 {
            self.memory.div_ceil(self.memory_columns)
        } else {
            0
        };
        memory
            .max(self.current.div_ceil(self.current_columns))
            .min(keys)
    }
}

/// The colour bins above budget. Bin `b` (1-based) holds ratios in
/// `(edge(b - 1), edge(b)]`; the last one everything finite above its lower edge.
struct Scale {
    /// Steps of the 1-2-5 sequence per bin (1, or a multiple of 3 for whole decades).
    step: usize,
    bins: usize,
}

impl Scale {
    fn new(largest_finite: f64) -> Self {
        // The 1-2-5 sequence reaches f64::MAX near index 925.
        let top = (1..=930)
            .find(|&u| sequence(u) >= largest_finite)
            .unwrap_or(930);
        let step = if top <= 6 { 1 } else { 3 * top.div_ceil(18) };
        Scale {
            step,
            bins: top.div_ceil(step),
        }
    }

    fn edge(&self, bin: usize) -> f64 {
        sequence(bin * self.step)
    }

    /// 0 within budget, `1..=bins` above it, `bins + 1` for infinite ratios.
    fn bin(&self, ratio: f64) -> usize {
        if ratio <= 1.0 {
            0
        } else if ratio.is_infinite() {
            self.bins + 1
        } else {
            (1..self.bins)
                .find(|&b| ratio <= self.edge(b))
                .unwrap_or(self.bins)
        }
    }

    fn colour(&self, bin: usize) -> String {
        match bin {
            0 => WITHIN_BUDGET.to_string(),
            b if b > self.bins => INFINITE.to_string(),
            b => ramp(b as f64 / self.bins as f64),
        }
    }
}

/// The `u`-th number of the sequence 1, 2, 5, 10, 20, 50, 100, ...
fn sequence(u: usize) -> f64 {
    [1.0, 2.0, 5.0][u % 3] * 10f64.powi((u / 3) as i32)
}

/// A number of the 1-2-5 sequence written briefly: `50`, `2000`, `5e4`.
fn sequence_label(u: usize) -> String {
    let (mantissa, exponent) = ([1, 2, 5][u % 3], u / 3);
    if exponent <= 3 {
        (mantissa * 10usize.pow(exponent as u32)).to_string()
    } else {
        format!("{mantissa}e{exponent}")
    }
}

fn ramp(t: f64) -> String {
    let t = t.clamp(0.0, 1.0);
    let (lower, upper) = if t <= RAMP[1].0 {
        (RAMP[0], RAMP[1])
    } else {
        (RAMP[1], RAMP[2])
    };
    let f = (t - lower.0) / (upper.0 - lower.0);
    let channel =
        |c: usize| (lower.1[c] as f64 + f * (upper.1[c] as f64 - lower.1[c] as f64)).round() as u8;
    format!("#{:02x}{:02x}{:02x}", channel(0), channel(1), channel(2))
}

/// Legend entries: (bin, label), in scale order.
fn legend_items(scale: &Scale) -> Vec<(usize, String)> {
    let mut items = vec![(0, "≤ 1 within budget".to_string())];
    for b in 1..=scale.bins {
        items.push((b, format!("> {}", sequence_label((b - 1) * scale.step))));
    }
    items.push((scale.bins + 1, "∞ masked leak or non-finite".to_string()));
    items
}

/// Width of a legend entry: swatch, gap and an estimate of the label's width.
fn item_width(label: &str) -> f64 {
    14.0 + 6.0 + 6.2 * label.chars().count() as f64 + 14.0
}

fn write_legend(svg: &mut String, scale: &Scale, items: &[(usize, String)], top: f64) {
    let _ = writeln!(
        svg,
        "<g class=\"legend\" transform=\"translate({PAGE_PAD} {top})\">"
    );
    let mut x = 0.0;
    for (bin, label) in items {
        let _ = writeln!(
            svg,
            "<rect x=\"{x:.1}\" y=\"0\" width=\"14\" height=\"14\" fill=\"{}\" stroke=\"{FRAME}\" stroke-width=\"0.5\"/>\
             <text x=\"{:.1}\" y=\"11\">{}</text>",
            scale.colour(*bin),
            x + 20.0,
            escape(label)
        );
        x += item_width(label);
    }
    svg.push_str("</g>\n");
}

/// One head's plot with its axes.
struct Panel<'a> {
    head: usize,
    largest: f64,
    cells: &'a [f64],
    grid: &'a Grid,
    scale: &'a Scale,
    queries: usize,
    keys: usize,
    memory: usize,
    width: f64,
    height: f64,
}

impl Panel<'_> {
    fn write(&self, svg: &mut String, x: f64, y: f64) {
        let (left, top, width, height) = (PLOT_LEFT, PLOT_TOP, self.width, self.height);
        let _ = writeln!(
            svg,
            "<g class=\"panel\" data-head=\"{}\" transform=\"translate({x:.1} {y:.1})\">",
            self.head
        );
        let largest = if self.largest.is_infinite() {
            "∞".to_string()
        } else {
            short_number(self.largest)
        };
        let _ = writeln!(
            svg,
            "<text x=\"4\" y=\"12\" font-size=\"12\"><tspan font-weight=\"bold\">head {}</tspan> · max {largest}</text>",
            self.head
        );
        let _ = writeln!(
            svg,
            "<rect x=\"{left}\" y=\"{top}\" width=\"{width:.2}\" height=\"{height:.2}\" fill=\"{WITHIN_BUDGET}\"/>"
        );
        let memory_width = width * self.memory as f64 / self.keys as f64;
        let regions = [
            (0, self.grid.memory_columns, left, memory_width),
            (
                self.grid.memory_columns,
                self.grid.columns(),
                left + memory_width,
                width - memory_width,
            ),
        ];
        for (first, end, region_x, region_width) in regions {
            if end > first {
                self.write_cells(svg, first, end, region_x, region_width);
            }
        }
        let _ = writeln!(
            svg,
            "<rect class=\"plot\" x=\"{left}\" y=\"{top}\" width=\"{width:.2}\" height=\"{height:.2}\" \
             fill=\"none\" stroke=\"{FRAME}\" stroke-width=\"1\"/>"
        );
        self.write_axes(svg);
        if self.memory > 0 {
            let boundary = left + memory_width;
            let label_x = boundary.clamp(left - 6.0, left + width - 30.0);
            let _ = writeln!(
                svg,
                "<line class=\"boundary\" x1=\"{boundary:.2}\" y1=\"{:.1}\" x2=\"{boundary:.2}\" y2=\"{:.1}\" \
                 stroke=\"{BOUNDARY}\" stroke-width=\"2\"/>\
                 <text x=\"{label_x:.2}\" y=\"{:.1}\" text-anchor=\"middle\" fill=\"{BOUNDARY}\">memory | current</text>",
                top - 10.0,
                top + height + 3.0,
                top - 13.0
            );
        }
        svg.push_str("</g>\n");
    }

    fn write_cells(
        &self,
        svg: &mut String,
        first: usize,
        end: usize,
        region_x: f64,
        region_width: f64,
    ) {
        let columns = self.grid.columns();
        let mut paths = vec![String::new(); self.scale.bins + 2];
        for row in 0..self.grid.rows {
            let line = &self.cells[row * columns + first..row * columns + end];
            let mut start = 0;
            while start < line.len() {
                let bin = self.scale.bin(line[start]);
                let run = line[start..]
                    .iter()
                    .take_while(|&&r| self.scale.bin(r) == bin)
                    .count();
                if bin > 0 {
                    let _ = write!(paths[bin], "M{start} {row}h{run}v1h-{run}z");
                }
                start += run;
            }
        }
        let scale_x = region_width / (end - first) as f64;
        let scale_y = self.height / self.grid.rows as f64;
        let _ = writeln!(
            svg,
            "<g transform=\"translate({region_x:.3} {PLOT_TOP}) scale({scale_x:.5} {scale_y:.5})\" \
             shape-rendering=\"crispEdges\">"
        );
        for (bin, path) in paths.iter().enumerate() {
            if !path.is_empty() {
                let _ = writeln!(
                    svg,
                    "<path fill=\"{}\" d=\"{path}\"/>",
                    self.scale.colour(bin)
                );
            }
        }
        svg.push_str("</g>\n");
    }

    fn write_axes(&self, svg: &mut String) {
        let (left, top, width, height) = (PLOT_LEFT, PLOT_TOP, self.width, self.height);
        let mut marks = String::new();
        let _ = writeln!(svg, "<g font-size=\"10\">");
        let x_step = tick_step(self.keys, (width / 44.0).max(2.0) as usize);
        for j in (0..self.keys).step_by(x_step) {
            let x = left + width * (j as f64 + 0.5) / self.keys as f64;
            let _ = write!(marks, "M{x:.1} {:.1}v3", top + height);
            let _ = writeln!(
                svg,
                "<text x=\"{x:.1}\" y=\"{:.1}\" text-anchor=\"middle\">{j}</text>",
                top + height + 13.0
            );
        }
        let y_step = tick_step(self.queries, (height / 22.0).max(1.0) as usize);
        for i in (0..self.queries).step_by(y_step) {
            let y = top + height * (i as f64 + 0.5) / self.queries as f64;
            let _ = write!(marks, "M{left} {y:.1}h-3");
            let _ = writeln!(
                svg,
                "<text x=\"{:.1}\" y=\"{:.1}\" text-anchor=\"end\">{i}</text>",
                left - 5.0,
                y + 3.5
            );
        }
        svg.push_str("</g>\n");
        let _ = writeln!(
            svg,
            "<path d=\"{marks}\" fill=\"none\" stroke=\"{FRAME}\" stroke-width=\"1\"/>\
             <text x=\"{:.1}\" y=\"{:.1}\" text-anchor=\"middle\">key index j</text>\
             <text transform=\"translate({:.1} {:.1}) rotate(-90)\" text-anchor=\"middle\">query index i</text>",
            left + width / 2.0,
            top + height + 30.0,
            left - 38.0,
            top + height / 2.0
        );
    }
}

/// The smallest step of the 1-2-5 sequence that puts at most `most` ticks on `n`
/// indices.
fn tick_step(n: usize, most: usize) -> usize {
    let most = most.max(1);
    (0..)
        .map(|u| sequence(u) as usize)
        .find(|&step| n.div_ceil(step) <= most)
        .unwrap_or(n.max(1))
}

/// A ratio with three significant figures.
fn short_number(x: f64) -> String {
    if x == 0.0 {
        "0".to_string()
    } else if (0.01..1000.0).contains(&x) {
        let decimals = (2 - x.log10().floor() as i32).max(0) as usize;
        format!("{x:.decimals$}")
    } else {
        format!("{x:.2e}")
    }
}
