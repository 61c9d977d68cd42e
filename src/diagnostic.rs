//! Diagnostics: what every stage returns when the input is wrong.
//!
//! A diagnostic is data: a message, an optional place (byte span in one source file) and
//! a suggested fix. Stages collect as many as they can before giving up; only the driver
//! renders them, through [`Diagnostic::render`], and picks the exit status.

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

/// Line number (1-based), column in characters (1-based) and text of the line holding
/// byte offset `offset`.
pub fn locate(src: &str, offset: usize) -> (usize, usize, &str) {
    let offset = offset.min(src.len());
    let line_start = src[..offset].rfind('\n').map_or(0, |i| i + 1);
    let line_end = src[offset..].find('\n').map_or(src.len(), |i| offset + i);
    let line_no = src[..line_start].matches('\n').count() + 1;
    let col = src[line_start..offset].chars().count() + 1;
    (line_no, col, src[line_start..line_end].trim_end_matches('\r'))
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
    fn suggests_close_names_only() {
        assert_eq!(closest("strik", ["strike", "coupon"]), Some("strike"));
        assert_eq!(closest("zzz", ["strike", "coupon"]), None);
    }
}
