//! How the report's series look: the palette, line patterns, marker shapes and widths of
//! the `i`-th series, and the marker and legend swatch elements (the `marker!` and
//! `swatch!` macros, used by the figure drawing modules declared after this one).

use plotters::prelude::*;

/// The report's series colours: the qualitative palette of M. Okabe and K. Ito, "Color
/// Universal Design (CUD): how to make figures and presentations that are friendly to
/// colorblind people" (2008), as published there: #0072B2 blue, #D55E00 vermillion, #009E73
/// bluish green, #CC79A7 reddish purple, #E69F00 orange, #56B4E9 sky blue. Its yellow
/// (#F0E442) is left out because thin lines in it vanish on white, and its black is the
/// colour of the axes and text.
pub const PALETTE: [RGBColor; 6] = [
    RGBColor(0x00, 0x72, 0xB2),
    RGBColor(0xD5, 0x5E, 0x00),
    RGBColor(0x00, 0x9E, 0x73),
    RGBColor(0xCC, 0x79, 0xA7),
    RGBColor(0xE6, 0x9F, 0x00),
    RGBColor(0x56, 0xB4, 0xE9),
];

/// Line pattern of a series.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Dash {
    Solid,
    Dashed,
    Dotted,
}

impl Dash {
    /// (drawn, gap) lengths in pixels; `None` for a solid line.
    pub fn pattern(self) -> Option<(u32, u32)> {
        match self {
            Dash::Solid => None,
            Dash::Dashed => Some((9, 5)),
            Dash::Dotted => Some((3, 4)),
        }
    }
}

/// Marker shape of a series. Only the disc is filled, so a hollow marker drawn on the same
/// spot leaves the one below it visible.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Shape {
    Disc,
    Triangle,
    Square,
    Diamond,
    Cross,
    Ring,
}

/// How one series is drawn.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Look {
    pub color: RGBColor,
    pub dash: Dash,
    pub shape: Option<Shape>,
    /// line width in pixels
    pub width: u32,
}

/// The look of the `i`-th series of a figure. Colour, line pattern and marker all change
/// from one series to the next (30 series before a combination repeats), so the figure
/// reads without colour and curves that coincide stay distinguishable: the solid line is the
/// widest and is drawn first, so a dashed or dotted curve on top of it leaves it visible in
/// the gaps, and the hollow markers leave the filled disc visible.
pub fn look(i: usize) -> Look {
    const DASHES: [Dash; 3] = [Dash::Solid, Dash::Dashed, Dash::Dotted];
    const SHAPES: [Shape; 5] = [
        Shape::Disc,
        Shape::Triangle,
        Shape::Square,
        Shape::Diamond,
        Shape::Cross,
    ];
    let dash = DASHES[i % DASHES.len()];
    Look {
        color: PALETTE[i % PALETTE.len()],
        dash,
        shape: Some(SHAPES[i % SHAPES.len()]),
        width: if dash == Dash::Solid { 3 } else { 2 },
    }
}

/// `c` moved the fraction `f` of the way to white.
pub fn tint(c: RGBColor, f: f64) -> RGBColor {
    let m = |x: u8| (f64::from(x) + (255.0 - f64::from(x)) * f).round() as u8;
    RGBColor(m(c.0), m(c.1), m(c.2))
}

/// A single series' look: solid line, filled discs.
pub fn plain(color: RGBColor) -> Look {
    Look {
        color,
        dash: Dash::Solid,
        shape: Some(Shape::Disc),
        width: 2,
    }
}

/// Length of a legend swatch's line in pixels.
pub const SWATCH: i32 = 28;

/// A pixel offset from an element's anchor.
pub type Px = (i32, i32);

/// The marker of a look as pixel offsets around its anchor: a filled polygon and an
/// outline (every shape is both, so that markers of all shapes have one element type;
/// hollow shapes fill with a transparent colour, which draws nothing).
pub fn marker_parts(look: &Look) -> (Vec<Px>, ShapeStyle, Vec<Px>, ShapeStyle) {
    let ngon = |r: f64, n: usize| -> Vec<Px> {
        (0..=n)
            .map(|k| {
                let a = std::f64::consts::TAU * k as f64 / n as f64;
                ((r * a.cos()).round() as i32, (r * a.sin()).round() as i32)
            })
            .collect()
    };
    let line = look.color.stroke_width(2);
    let hollow = TRANSPARENT.filled();
    let Some(shape) = look.shape else {
        return (Vec::new(), hollow, Vec::new(), line);
    };
    let outline = match shape {
        Shape::Disc => {
            let p = ngon(4.5, 16);
            return (
                p.clone(),
                look.color.filled(),
                p,
                look.color.stroke_width(1),
            );
        }
        Shape::Ring => ngon(8.0, 24),
        Shape::Triangle => vec![(0, -7), (6, 4), (-6, 4), (0, -7)],
        Shape::Square => vec![(-5, -5), (5, -5), (5, 5), (-5, 5), (-5, -5)],
        Shape::Diamond => vec![(0, -7), (7, 0), (0, 7), (-7, 0), (0, -7)],
        Shape::Cross => vec![(-5, -5), (5, 5), (0, 0), (-5, 5), (5, -5)],
    };
    (outline.clone(), hollow, outline, line)
}

/// The marker of `$look` at `$at` (data coordinates) as one element.
macro_rules! marker {
    ($at:expr, $look:expr) => {{
        #[allow(unused_imports)]
        use ::plotters::element::DashedPathElement;
        use ::plotters::prelude::*;
        #[allow(unused_imports)]
        use $crate::export::report::style::{marker_parts, Look, Px, SWATCH};
        let (fill, fill_style, outline, line_style) = marker_parts(&$look);
        EmptyElement::at($at)
            + Polygon::new(fill, fill_style)
            + PathElement::new(outline, line_style)
    }};
}

/// The legend swatch of `$look` at the legend anchor `$at`: a line of [`SWATCH`] pixels in
/// the look's pattern (with `$line`) and the look's marker in its middle.
macro_rules! swatch {
    ($at:expr, $look:expr, $line:expr) => {{
        #[allow(unused_imports)]
        use ::plotters::element::DashedPathElement;
        use ::plotters::prelude::*;
        #[allow(unused_imports)]
        use $crate::export::report::style::{marker_parts, Look, Px, SWATCH};
        let look: Look = $look;
        let (fill, fill_style, outline, line_style) = marker_parts(&look);
        let mid =
            |v: Vec<Px>| -> Vec<Px> { v.into_iter().map(|(x, y)| (x + SWATCH / 2, y)).collect() };
        // a solid line is a dash longer than the swatch
        let (on, off) = look.dash.pattern().unwrap_or((1000, 1));
        let path: Vec<Px> = if $line {
            vec![(0, 0), (SWATCH, 0)]
        } else {
            vec![(0, 0)]
        };
        EmptyElement::at($at)
            + DashedPathElement::new(path, on, off, look.color.stroke_width(look.width))
            + Polygon::new(mid(fill), fill_style)
            + PathElement::new(mid(outline), line_style)
    }};
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::collections::BTreeSet;

    #[test]
    fn series_looks_differ_in_more_than_colour() {
        // 30 series before a (colour, pattern, marker) combination repeats
        let combos: BTreeSet<_> = (0..30)
            .map(|i| {
                let l = look(i);
                (l.color.rgb(), l.dash as u8, l.shape.map(|s| s as u8))
            })
            .collect();
        assert_eq!(combos.len(), 30);
        assert_eq!(look(30), look(0));
        // neighbours differ in pattern and marker, not only in colour
        for i in 0..29 {
            let (a, b) = (look(i), look(i + 1));
            assert_ne!(a.dash, b.dash);
            assert_ne!(a.shape, b.shape);
        }
        // the solid line is the widest, and only the disc is filled
        assert!(look(0).width > look(1).width && look(0).width > look(2).width);
        for i in 0..5 {
            let (fill, fill_style, _, _) = marker_parts(&look(i));
            let filled = !fill.is_empty() && fill_style.color.alpha() > 0.0;
            assert_eq!(filled, look(i).shape == Some(Shape::Disc), "{i}");
        }
    }

    #[test]
    fn palette_is_okabe_ito_without_yellow_and_black() {
        let hex: Vec<String> = PALETTE
            .iter()
            .map(|c| format!("#{:02X}{:02X}{:02X}", c.0, c.1, c.2))
            .collect();
        assert_eq!(
            hex,
            ["#0072B2", "#D55E00", "#009E73", "#CC79A7", "#E69F00", "#56B4E9"]
        );
        assert_eq!(tint(RGBColor(0, 100, 255), 0.5), RGBColor(128, 178, 255));
    }
}
