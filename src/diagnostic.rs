//! Diagnostics: what every stage returns when the input is wrong.
//!
//! A diagnostic is data: a message, an optional place (byte span in one source file) and
//! a suggested fix. Stages collect as many as they can before giving up; only the commands
//! render them, through [`Diagnostic::render`], and pick the exit status.

use std::fmt::Write as _;
use std::path::{Path, PathBuf};

/// A half-open byte range `[start, end)` in a source text.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, Hash)]
pub struct Span {
    pub start: usize,
    pub end: usize,
}

impl Span {
    pub fn new(start: usize, end: usize) -> Self {
        Span { start, end }
    }

    /// The smallest span covering both.
    pub fn join(self, other: Span) -> Span {
        Span::new(self.start.min(other.start), self.end.max(other.end))
    }
}

/// One problem with the input, with where it is and how to fix it.
#[derive(Clone, Debug, PartialEq)]
pub struct Diagnostic {
    /// The file the problem is in, when it is in a file.
    pub file: Option<PathBuf>,
    /// Where in the file, when the place is known.
    pub span: Option<Span>,
    /// What is wrong, in plain words.
    pub message: String,
    /// What would fix it.
    pub fix: Option<String>,
    /// A warning is shown but does not stop the run.
    pub warning: bool,
}

impl Diagnostic {
    pub fn new(message: impl Into<String>) -> Self {
        Diagnostic { file: None, span: None, message: message.into(), fix: None, warning: false }
    }

    pub fn at(span: Span, message: impl Into<String>) -> Self {
        Diagnostic { span: Some(span), ..Diagnostic::new(message) }
    }

    #[must_use]
    pub fn with_fix(mut self, fix: impl Into<String>) -> Self {
        self.fix = Some(fix.into());
        self
    }

    /// Marks the diagnostic as a warning: shown, but the run goes on.
    #[must_use]
    pub fn as_warning(mut self) -> Self {
        self.warning = true;
        self
    }

    #[must_use]
    pub fn in_file(mut self, file: &Path) -> Self {
        if self.file.is_none() {
            self.file = Some(file.to_path_buf());
        }
        self
    }

    /// Renders the diagnostic as text for people:
    ///
    /// ```text
    /// payoffs/call.payoff:7:31: unknown name `strik`
    ///      7 | pay notional * max(perf(ZPHX) - strik, 0)
    ///        |                                  ^^^^^
    ///   fix: did you mean `strike`?
    /// ```
    ///
    /// `source` is the text of `self.file`; without it only the first line is drawn.
    pub fn render(&self, source: Option<&str>) -> String {
        let mut out = String::new();
        let warned;
        let message = if self.warning {
            warned = format!("warning: {}", self.message);
            &warned
        } else {
            &self.message
        };
        let file = self.file.as_ref().map(|f| f.display().to_string());
        match (&file, self.span, source) {
            (Some(file), Some(span), Some(src)) => {
                let (line_no, col, line) = locate(src, span.start);
                let _ = writeln!(out, "{file}:{line_no}:{col}: {message}");
                // A very long line is shown around the place only.
                let (line, col) = window(line, col);
                let line = line.as_str();
                let gutter = line_no.to_string().len().max(4);
                let shown = line.replace('\t', " ");
                let _ = writeln!(out, "{line_no:>gutter$} | {shown}");
                let width = span.end.saturating_sub(span.start).max(1);
                let width = width.min(line.len().saturating_sub(col - 1).max(1));
                let _ = writeln!(out, "{:>gutter$} | {}{}", "", " ".repeat(col - 1), "^".repeat(width));
            }
            (Some(file), _, _) => {
                let _ = writeln!(out, "{file}: {message}");
            }
            (None, _, _) => {
                let _ = writeln!(out, "{message}");
            }
        }
        if let Some(fix) = &self.fix {
            let _ = writeln!(out, "  fix: {fix}");
        }
        out
    }
}

/// The widest line drawn under a message, in characters.
const SHOWN_WIDTH: usize = 120;

/// `line` cut to at most [`SHOWN_WIDTH`] characters around column `col` (marked `...` where
/// cut), with the column in the cut text.
fn window(line: &str, col: usize) -> (String, usize) {
    let chars: Vec<char> = line.chars().collect();
    if chars.len() <= SHOWN_WIDTH {
        return (line.to_string(), col);
    }
    let first = (col - 1).saturating_sub(SHOWN_WIDTH / 4).min(chars.len().saturating_sub(SHOWN_WIDTH));
    let last = (first + SHOWN_WIDTH).min(chars.len());
    let mut shown = String::new();
    let mut col = col - first;
    if first > 0 {
        shown.push_str("...");
        col += 3;
    }
    shown.extend(&chars[first..last]);
    if last < chars.len() {
        shown.push_str("...");
    }
    (shown, col)
}

/// Line number (1-based), column in characters (1-based) and text of the line holding
/// byte offset `offset`. Lines end at LF, CRLF or a lone CR; a leading byte-order mark
/// takes no column.
pub fn locate(src: &str, offset: usize) -> (usize, usize, &str) {
    let mut offset = offset.min(src.len());
    while !src.is_char_boundary(offset) {
        offset -= 1;
    }
    let bytes = src.as_bytes();
    let mut line_no = 1;
    let mut line_start = 0;
    for (i, &b) in bytes[..offset].iter().enumerate() {
        let ends = b == b'\n' || (b == b'\r' && bytes.get(i + 1) != Some(&b'\n'));
        if ends {
            line_no += 1;
            line_start = i + 1;
        }
    }
    let line_end = src[offset..].find(['\n', '\r']).map_or(src.len(), |i| offset + i);
    let col = src[line_start..offset].chars().filter(|c| *c != '\u{feff}').count() + 1;
    (line_no, col, src[line_start..line_end].trim_start_matches('\u{feff}'))
}

/// The text of a source file given as bytes. Text that is not UTF-8 is refused with the
/// line and column of the first bad byte; the error comes with the text read so far
/// (bad bytes replaced), for drawing the line.
pub fn decode_source(bytes: Vec<u8>) -> Result<String, Box<(Diagnostic, String)>> {
    match String::from_utf8(bytes) {
        Ok(text) => Ok(text),
        Err(e) => {
            let at = e.utf8_error().valid_up_to();
            let byte = e.as_bytes()[at];
            let text = String::from_utf8_lossy(e.as_bytes()).into_owned();
            let d = Diagnostic::at(Span::new(at, at + 1), format!("byte 0x{byte:02X} here is not UTF-8 text"))
                .with_fix("save the file as UTF-8 (payoff files are plain UTF-8 text)");
            Err(Box::new((d, text)))
        }
    }
}

/// Renders a list of diagnostics, one after another.
pub fn render_all(diagnostics: &[Diagnostic], source: Option<&str>) -> String {
    diagnostics.iter().map(|d| d.render(source)).collect()
}

/// The closest of `candidates` to `name`, if one is close enough to be a likely typo.
pub fn closest<'a>(name: &str, candidates: impl IntoIterator<Item = &'a str>) -> Option<&'a str> {
    candidates
        .into_iter()
        .map(|c| (edit_distance(&name.to_lowercase(), &c.to_lowercase()), c))
        .filter(|&(d, c)| d <= (c.len().max(name.len()) / 3).max(1))
        .min_by_key(|&(d, _)| d)
        .map(|(_, c)| c)
}

fn edit_distance(a: &str, b: &str) -> usize {
    let b: Vec<char> = b.chars().collect();
    let mut row: Vec<usize> = (0..=b.len()).collect();
    for (i, ca) in a.chars().enumerate() {
        let mut diag = row[0];
        row[0] = i + 1;
        for (j, &cb) in b.iter().enumerate() {
            let next = (diag + usize::from(ca != cb)).min(row[j] + 1).min(row[j + 1] + 1);
            diag = row[j + 1];
            row[j + 1] = next;
        }
    }
    row[b.len()]
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn renders_line_and_caret() {
        let src = "product \"x\"\npay notional * strik\n";
        let d = Diagnostic::at(Span::new(27, 32), "unknown name `strik`")
            .with_fix("did you mean `strike`?")
            .in_file(Path::new("a.payoff"));
        assert_eq!(
            d.render(Some(src)),
            "a.payoff:2:16: unknown name `strik`\n   2 | pay notional * strik\n     |                ^^^^^\n  fix: did you mean `strike`?\n"
        );
    }

    #[test]
    fn lines_end_at_lf_crlf_or_cr_and_a_bom_takes_no_column() {
        let src = "a\r\nbb\rccc\nd";
        assert_eq!(locate(src, src.find('c').unwrap() + 1), (3, 2, "ccc"));
        assert_eq!(locate(src, src.find('b').unwrap()), (2, 1, "bb"));
        assert_eq!(locate("\u{feff}pay x", 7), (1, 5, "pay x"));
    }

    #[test]
    fn long_lines_are_shown_around_the_place() {
        let line = format!("{}X{}", "a".repeat(500), "b".repeat(500));
        let (shown, col) = window(&line, 501);
        assert!(shown.chars().count() <= SHOWN_WIDTH + 6);
        assert_eq!(shown.chars().nth(col - 1), Some('X'));
    }

    #[test]
    fn text_that_is_not_utf8_is_placed() {
        let (d, text) = *decode_source(b"ab\ncd\xff".to_vec()).unwrap_err();
        assert_eq!(d.span, Some(Span::new(5, 6)));
        assert_eq!(locate(&text, 5).0, 2);
        assert_eq!(decode_source(b"ok".to_vec()).unwrap(), "ok");
    }

    #[test]
    fn suggests_close_names_only() {
        assert_eq!(closest("strik", ["strike", "coupon"]), Some("strike"));
        assert_eq!(closest("zzz", ["strike", "coupon"]), None);
    }
}
