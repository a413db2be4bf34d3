//! The analysis core's own parameter types: how to threshold, what to correct
//! first, how pixels connect, whether touching objects are split, which
//! objects to keep.
//!
//! The configuration module builds these from the file; the core never reads
//! configuration. Checking the values' ranges is the configuration's job, and
//! each type documents the range it expects.

use std::sync::Arc;

use crate::analysis::correct::FlatField;

/// Threshold method and its parameters.
#[derive(Debug, Clone, PartialEq)]
pub enum Method {
    /// Otsu's method (Otsu 1979).
    Otsu,
    /// The triangle method (Zack, Rogers & Latt 1977).
    Triangle,
    /// Li's minimum cross-entropy (Li & Lee 1993; Li & Tam 1998).
    Li,
    /// Multi-level Otsu with `classes` classes; foreground is above threshold
    /// number `boundary` (1-based, `1..classes`).
    MultiOtsu {
        /// Number of classes, 2 to 5.
        classes: usize,
        /// Which of the `classes - 1` thresholds separates foreground.
        boundary: usize,
    },
    /// A fixed level: foreground is `pixel > level`.
    Fixed(u16),
}

impl Method {
    /// The method's name, as written in the configuration and stored with results.
    pub fn name(&self) -> &'static str {
        match self {
            Method::Otsu => "otsu",
            Method::Triangle => "triangle",
            Method::Li => "li",
            Method::MultiOtsu { .. } => "multi-otsu",
            Method::Fixed(_) => "fixed",
        }
    }

    /// True for the methods built on Otsu's criterion (whose reliability
    /// Otsu's separability speaks for).
    pub fn is_otsu_based(name: &str) -> bool {
        matches!(name, "otsu" | "multi-otsu")
    }
}

/// Background correction applied before thresholding.
#[derive(Debug, Clone, PartialEq)]
pub enum Background {
    /// No correction.
    None,
    /// Rolling-ball background (Sternberg 1983) of this radius, subtracted.
    RollingBall {
        /// Ball radius in pixels.
        radius_px: f64,
    },
    /// Flat-field correction with user-supplied flat (and optional dark) frames.
    FlatField(Arc<FlatField>),
}

/// Which neighbours join pixels into one object.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Connectivity {
    /// Edge neighbours only (up, down, left, right).
    Four,
    /// Edge and corner neighbours.
    Eight,
}

impl Connectivity {
    /// 4 or 8, as written in the configuration.
    pub fn neighbours(self) -> u8 {
        match self {
            Connectivity::Four => 4,
            Connectivity::Eight => 8,
        }
    }

    /// The connectivity of `n` neighbours, for 4 and 8 only.
    pub fn from_neighbours(n: u8) -> Option<Connectivity> {
        match n {
            4 => Some(Connectivity::Four),
            8 => Some(Connectivity::Eight),
            _ => None,
        }
    }
}

/// Whether and how touching objects are split after labelling.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Split {
    /// Objects stay as labelled.
    None,
    /// Marker-controlled watershed of the distance map
    /// ([`crate::analysis::split`]): an object is cut where its distance to
    /// the background dips by at least `min_depth_px` between two maxima at
    /// least `min_separation_px` apart.
    Distance {
        /// The smallest dynamic (h-maxima depth) of a distance maximum that
        /// makes it a piece of its own, in pixels; positive.
        min_depth_px: f64,
        /// The smallest distance, in pixels, from a maximum to the higher
        /// maximum its basin meets for it to be a piece of its own; 0 = any.
        min_separation_px: f64,
    },
}

impl Split {
    /// The depth used when none is given: 0.6 px, with the separation
    /// below. Two discs of radius `r` whose centres are `D` apart meet in a
    /// neck of half-width `sqrt(r² - D²/4)`, so the smaller maximum's dynamic
    /// is about `r - sqrt(r² - D²/4)`; a small disc overlapping a large one
    /// has a dynamic of under 1 px (radii 7 and 13, 15 px apart: 0.9 px), so
    /// a depth of 1 px or more leaves such pairs merged. What a small depth
    /// lets through on its own, the pixel grid's and a rough outline's bumps
    /// along one object, lies close together and is rejected by the
    /// separation. Chosen on the accuracy benchmark (`benches/README.md`):
    /// at 0.6 px and 10 px F1 at IoU 0.5 is at least the scikit-image split's
    /// on every kind of scene; 0.5 px over-cuts rough (textured) objects, and
    /// 0.75 px or more misses crowded pairs.
    pub const DEFAULT_MIN_DEPTH_PX: f64 = 0.6;

    /// The separation used when none is given: 10 px, the centre distance of
    /// two nuclei of radius 6.7 px overlapping by a quarter (`D = 1.5 r`).
    /// Smaller nuclei (objects under about 140 px²) that touch stay merged at
    /// this value: lower it to about 1.5 × their radius.
    pub const DEFAULT_MIN_SEPARATION_PX: f64 = 10.0;

    /// The name written in the configuration.
    pub fn name(&self) -> &'static str {
        match self {
            Split::None => "none",
            Split::Distance { .. } => "distance",
        }
    }
}

/// Which labelled components are kept as objects.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ObjectFilter {
    /// Smallest area kept, in pixels.
    pub min_area_px: u64,
    /// Largest area kept, in pixels; 0 = no limit.
    pub max_area_px: u64,
    /// Smallest area kept in µm², applied when the pixel size is known; 0 = off.
    pub min_area_um2: f64,
    /// Largest area kept in µm², applied when the pixel size is known; 0 = off.
    pub max_area_um2: f64,
    /// Drop objects that touch the frame's edge.
    pub exclude_border: bool,
}

impl ObjectFilter {
    /// The default smallest object, in pixels: see `min_area_px` in
    /// `config/framewarden.toml` for the reasoning.
    pub const DEFAULT_MIN_AREA_PX: u64 = 20;

    /// A filter that keeps every component (for tests and benches that want
    /// the raw labelling).
    pub const KEEP_ALL: ObjectFilter = ObjectFilter {
        min_area_px: 0,
        max_area_px: 0,
        min_area_um2: 0.0,
        max_area_um2: 0.0,
        exclude_border: false,
    };

    /// True when an object of `area_px` pixels passes the size limits: the
    /// pixel limits, and the µm² limits when `pixel_size_um` is known.
    pub fn keeps_size(&self, area_px: u64, pixel_size_um: Option<f64>) -> bool {
        let um2_ok = pixel_size_um
            .map(|p| area_px as f64 * p * p)
            .is_none_or(|a| {
                a >= self.min_area_um2 && (self.max_area_um2 == 0.0 || a <= self.max_area_um2)
            });
        area_px >= self.min_area_px
            && (self.max_area_px == 0 || area_px <= self.max_area_px)
            && um2_ok
    }

    /// True when the filter keeps an object of `area_px` pixels that touches
    /// the frame's edge or not: its size limits and the edge rule.
    pub fn keeps(&self, area_px: u64, touches_edge: bool, pixel_size_um: Option<f64>) -> bool {
        self.keeps_size(area_px, pixel_size_um) && !(self.exclude_border && touches_edge)
    }
}

impl Default for ObjectFilter {
    fn default() -> Self {
        ObjectFilter {
            min_area_px: ObjectFilter::DEFAULT_MIN_AREA_PX,
            max_area_px: 0,
            min_area_um2: 0.0,
            max_area_um2: 0.0,
            exclude_border: false,
        }
    }
}

/// Everything [`crate::analysis::segment::analyze_frame`] needs to segment and
/// measure one frame.
#[derive(Debug, Clone, PartialEq)]
pub struct SegmentParams {
    /// The page of a multi-page file that is segmented.
    pub page: usize,
    /// How the threshold is chosen.
    pub method: Method,
    /// Gaussian pre-smoothing σ in pixels; 0 = off.
    pub smooth_sigma_px: f64,
    /// Correction applied before thresholding.
    pub background: Background,
    /// Fill enclosed background into the object around it.
    pub fill_holes: bool,
    /// How object pixels connect (holes use the complementary connectivity).
    pub connectivity: Connectivity,
    /// Whether touching objects are split (after labelling, before measuring).
    pub split: Split,
    /// Which components are kept as objects.
    pub filter: ObjectFilter,
    /// Other pages whose intensities are measured inside the objects.
    pub measure_pages: Vec<usize>,
    /// Most components one frame may hold before measuring: above it the frame
    /// is refused ([`crate::analysis::AnalysisError::TooManyObjects`]), since a
    /// threshold on noise or on a fine pattern gives millions of "objects" whose
    /// measures would take gigabytes and whose rows would swamp the database.
    pub max_objects: usize,
}

impl SegmentParams {
    /// The default for [`SegmentParams::max_objects`]: far above any countable
    /// scene (a 2048² frame packed with the smallest objects counted by default,
    /// 20 px, holds about 200,000 at most; a crowded field of cells, a few
    /// thousand).
    pub const DEFAULT_MAX_OBJECTS: usize = 250_000;
}

impl Default for SegmentParams {
    fn default() -> Self {
        Self {
            page: 0,
            method: Method::Otsu,
            smooth_sigma_px: 0.0,
            background: Background::None,
            fill_holes: true,
            connectivity: Connectivity::Eight,
            split: Split::Distance {
                min_depth_px: Split::DEFAULT_MIN_DEPTH_PX,
                min_separation_px: Split::DEFAULT_MIN_SEPARATION_PX,
            },
            filter: ObjectFilter::default(),
            measure_pages: Vec::new(),
            max_objects: SegmentParams::DEFAULT_MAX_OBJECTS,
        }
    }
}
