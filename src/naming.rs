//! The file-name pattern: a regular expression with named groups that picks
//! the well, site, time point and channel (and any other part) out of a file's
//! name.
//!
//! The watcher names each file's parts with it and the store keeps them in
//! their own columns; what a position is (well, site and channel) is the
//! store's definition.

use std::collections::BTreeMap;
use std::path::Path;

use regex::Regex;

/// Parts of a file name picked out by the configured pattern.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct NameParts {
    /// The `well` group, e.g. `B03`.
    pub well: Option<String>,
    /// The `site` group (field of view within the well).
    pub site: Option<String>,
    /// The `time_point` group.
    pub time_point: Option<String>,
    /// The `channel` group.
    pub channel: Option<String>,
    /// Every named part, including the four above.
    pub all: BTreeMap<String, String>,
}

impl NameParts {
    /// The time point as a number, for ordering frames: the first run of
    /// digits in `time_point` (`t0013` and `0013` are 13); `None` when the
    /// pattern names no time point or it has no digits.
    ///
    /// ```
    /// use framewarden::naming::NameParts;
    /// let parts = NameParts { time_point: Some("t0013".into()), ..NameParts::default() };
    /// assert_eq!(parts.time_point_index(), Some(13));
    /// ```
    pub fn time_point_index(&self) -> Option<i64> {
        let t = self.time_point.as_deref()?;
        let digits: String = t
            .chars()
            .skip_while(|c| !c.is_ascii_digit())
            .take_while(char::is_ascii_digit)
            .collect();
        digits.parse().ok()
    }

    /// The parts of page `page` of the stack at `path`, from the parts its
    /// name gives: the time point is the page (a stack appends one page per
    /// time point), and when the pattern names neither a well nor a site the
    /// file's name without its extension is the site, so that each stack is a
    /// position of its own.
    ///
    /// ```
    /// use framewarden::naming::NameParts;
    /// let parts = NameParts::default().of_page(std::path::Path::new("/acq/pos3.ome.tif"), 7);
    /// assert_eq!(parts.site.as_deref(), Some("pos3.ome"));
    /// assert_eq!(parts.time_point_index(), Some(7));
    /// ```
    pub fn of_page(mut self, path: &Path, page: usize) -> NameParts {
        if self.well.is_none() && self.site.is_none() {
            self.site = path.file_stem().map(|s| s.to_string_lossy().into_owned());
        }
        self.time_point = Some(page.to_string());
        self
    }
}

/// The file-name pattern: a regular expression with named groups; `well`,
/// `site`, `time_point` and `channel` get their own columns, every group is
/// kept. The empty pattern names nothing.
#[derive(Debug, Clone, Default)]
pub struct NamePattern(Option<Regex>);

impl PartialEq for NamePattern {
    fn eq(&self, other: &Self) -> bool {
        self.as_str() == other.as_str()
    }
}

impl NamePattern {
    /// Compiles `pattern`; the empty string is "no pattern".
    ///
    /// # Errors
    /// The regular expression's own error.
    pub fn new(pattern: &str) -> Result<NamePattern, regex::Error> {
        if pattern.is_empty() {
            Ok(NamePattern(None))
        } else {
            Regex::new(pattern).map(|re| NamePattern(Some(re)))
        }
    }

    /// The pattern as written (empty for none).
    pub fn as_str(&self) -> &str {
        self.0.as_ref().map_or("", Regex::as_str)
    }

    /// The named parts of `path`'s file name (all empty when there is no
    /// pattern or the name does not match).
    ///
    /// ```
    /// use framewarden::naming::NamePattern;
    /// let p = NamePattern::new(r"^(?P<well>[A-H]\d{2})_t(?P<time_point>\d+)\.tif$").unwrap();
    /// let parts = p.parts(std::path::Path::new("/night/B03_t012.tif"));
    /// assert_eq!(parts.well.as_deref(), Some("B03"));
    /// assert_eq!(parts.time_point.as_deref(), Some("012"));
    /// assert_eq!(parts.site, None);
    /// ```
    pub fn parts(&self, path: &Path) -> NameParts {
        let mut parts = NameParts::default();
        let (Some(re), Some(name)) = (&self.0, path.file_name().and_then(|n| n.to_str())) else {
            return parts;
        };
        let Some(caps) = re.captures(name) else {
            return parts;
        };
        for group in re.capture_names().flatten() {
            if let Some(m) = caps.name(group) {
                parts.all.insert(group.to_string(), m.as_str().to_string());
            }
        }
        parts.well = parts.all.get("well").cloned();
        parts.site = parts.all.get("site").cloned();
        parts.time_point = parts.all.get("time_point").cloned();
        parts.channel = parts.all.get("channel").cloned();
        parts
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn name_parts_go_to_their_fields() {
        let p = NamePattern::new(
            r"^(?P<well>[A-H]\d{2})_t(?P<time_point>\d+)_(?P<channel>[a-z]+)(_s(?P<site>\d+))?\.tif$",
        )
        .unwrap();
        let parts = p.parts(Path::new("/acq/C07_t0013_nuclei_s2.tif"));
        assert_eq!(parts.well.as_deref(), Some("C07"));
        assert_eq!(parts.site.as_deref(), Some("2"));
        assert_eq!(parts.time_point.as_deref(), Some("0013"));
        assert_eq!(parts.channel.as_deref(), Some("nuclei"));
        assert_eq!(parts.all.len(), 4);
        assert_eq!(p.parts(Path::new("/acq/other.tif")), NameParts::default());
        assert_eq!(
            NamePattern::new("")
                .unwrap()
                .parts(Path::new("/acq/C07_t0013_nuclei.tif")),
            NameParts::default()
        );
    }
}
