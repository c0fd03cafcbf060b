//! Problems found in a scenario, as values. The library never prints; the
//! command-line layer renders these with miette.

use std::fmt;

use miette::{LabeledSpan, NamedSource, Severity, SourceSpan};

use crate::span::{Sources, Span};

/// One labelled place in the source.
#[derive(Debug, Clone)]
pub struct Label {
    pub span: Span,
    pub text: String,
}

/// A diagnostic: a plain primary message, labels on exact spans, an optional
/// `help:` line and a stable code explained in `docs/errors.md`.
#[derive(Debug, Clone)]
pub struct Problem {
    pub code: &'static str,
    pub message: String,
    pub labels: Vec<Label>,
    pub help: Option<String>,
    pub warning: bool,
}

impl Problem {
    pub fn error(code: &'static str, message: impl Into<String>) -> Problem {
        Problem {
            code,
            message: message.into(),
            labels: Vec::new(),
            help: None,
            warning: false,
        }
    }

    pub fn warning(code: &'static str, message: impl Into<String>) -> Problem {
        Problem {
            warning: true,
            ..Problem::error(code, message)
        }
    }

    pub fn label(mut self, span: Span, text: impl Into<String>) -> Problem {
        self.labels.push(Label {
            span,
            text: text.into(),
        });
        self
    }

    pub fn help(mut self, text: impl Into<String>) -> Problem {
        self.help = Some(text.into());
        self
    }

    /// The primary span (the first label), if any.
    pub fn primary(&self) -> Option<Span> {
        self.labels.first().map(|l| l.span)
    }

    /// Attach the source text so miette can render it. Labels in other files
    /// than the primary one are folded into the help text with their location.
    pub fn render(&self, sources: &Sources) -> Rendered {
        let mut help = self.help.clone();
        let mut labels = Vec::new();
        let mut source = None;
        if let Some(primary) = self.primary() {
            let file = sources.get(primary.file);
            let text = file.text.as_str();
            for label in &self.labels {
                if label.span.file == primary.file && drawable(text, label.span) {
                    labels.push(LabeledSpan::new(
                        Some(label.text.clone()),
                        label.span.start as usize,
                        label.span.len(),
                    ));
                } else {
                    let (line, col) = sources.line_col(label.span);
                    let note = format!(
                        "{} (at {}:{}:{})",
                        label.text,
                        sources.get(label.span.file).name,
                        line,
                        col
                    );
                    help = Some(match help {
                        Some(h) => format!("{h}\n{note}"),
                        None => note,
                    });
                }
            }
        }
        if let (Some(primary), false) = (self.primary(), labels.is_empty()) {
            // Some label is drawn (else all went to the help text).
            let file = sources.get(primary.file);
            source = Some(NamedSource::new(
                file.name.clone(),
                file.text.as_str().to_owned(),
            ));
        }
        Rendered {
            problem: self.clone(),
            help,
            labels,
            source,
        }
    }

    /// `file:line:col` of the primary span, for plain-text and JSON output.
    pub fn location(&self, sources: &Sources) -> Option<(String, usize, usize)> {
        self.primary().map(|span| {
            let (line, col) = sources.line_col(span);
            (sources.get(span.file).name.clone(), line, col)
        })
    }
}

/// Longest line, in bytes, drawn in a source snippet (with the line before
/// and the one after, each shown whole). A label on a longer line, or next
/// to one, is given as `file:line:col` in the help text instead: a snippet
/// thousands of columns wide helps no one, costs time to draw for every
/// problem, and miette cannot underline past column 65535.
pub const MAX_DRAWN_LINE: usize = 2000;

fn drawable(text: &str, span: Span) -> bool {
    let (start, end) = (span.start as usize, span.end as usize);
    if start > end
        || end > text.len()
        || !text.is_char_boundary(start)
        || !text.is_char_boundary(end)
    {
        return false;
    }
    let bytes = text.as_bytes();
    // From the start of the line before to the end of the line after.
    let line_start = text[..start].rfind('\n').map_or(0, |i| i + 1);
    let from = if line_start == 0 {
        0
    } else {
        text[..line_start - 1].rfind('\n').map_or(0, |i| i + 1)
    };
    let line_end = text[end..].find('\n').map_or(text.len(), |i| end + i);
    let to = if line_end >= text.len() {
        line_end
    } else {
        text[line_end + 1..]
            .find('\n')
            .map_or(text.len(), |i| line_end + 1 + i)
    };
    // The span itself may cross lines (a stage); each line must be short.
    let mut longest = 0;
    let mut last = from;
    for (i, &b) in bytes[from..to].iter().enumerate() {
        if b == b'\n' {
            longest = longest.max(from + i - last);
            last = from + i + 1;
        }
        if longest > MAX_DRAWN_LINE {
            return false;
        }
    }
    longest.max(to - last) <= MAX_DRAWN_LINE
}

impl fmt::Display for Problem {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(&self.message)
    }
}

/// A [`Problem`] with its source attached, ready for miette.
#[derive(Debug)]
pub struct Rendered {
    problem: Problem,
    help: Option<String>,
    labels: Vec<LabeledSpan>,
    source: Option<NamedSource<String>>,
}

impl fmt::Display for Rendered {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(&self.problem.message)
    }
}

impl std::error::Error for Rendered {}

impl miette::Diagnostic for Rendered {
    fn code<'a>(&'a self) -> Option<Box<dyn fmt::Display + 'a>> {
        Some(Box::new(self.problem.code))
    }

    fn severity(&self) -> Option<Severity> {
        Some(if self.problem.warning {
            Severity::Warning
        } else {
            Severity::Error
        })
    }

    fn help<'a>(&'a self) -> Option<Box<dyn fmt::Display + 'a>> {
        self.help
            .as_ref()
            .map(|h| Box::new(h.as_str()) as Box<dyn fmt::Display>)
    }

    fn source_code(&self) -> Option<&dyn miette::SourceCode> {
        self.source.as_ref().map(|s| s as &dyn miette::SourceCode)
    }

    fn labels(&self) -> Option<Box<dyn Iterator<Item = LabeledSpan> + '_>> {
        if self.labels.is_empty() {
            None
        } else {
            Some(Box::new(self.labels.iter().cloned()))
        }
    }
}

impl From<Span> for SourceSpan {
    fn from(span: Span) -> SourceSpan {
        SourceSpan::new((span.start as usize).into(), span.len())
    }
}

/// Edit distance for "did you mean" suggestions: insertions, deletions,
/// substitutions and swaps of two neighbouring characters each cost one
/// (optimal string alignment), so `ocaen` is one edit from `ocean`.
pub fn edit_distance(a: &str, b: &str) -> usize {
    let a: Vec<char> = a.chars().collect();
    let b: Vec<char> = b.chars().collect();
    // Three rows: i-2, i-1 and i.
    let mut before: Vec<usize> = vec![0; b.len() + 1];
    let mut prev: Vec<usize> = (0..=b.len()).collect();
    let mut cur: Vec<usize> = vec![0; b.len() + 1];
    for i in 1..=a.len() {
        cur[0] = i;
        for j in 1..=b.len() {
            let cost = usize::from(a[i - 1] != b[j - 1]);
            let mut d = (prev[j] + 1).min(cur[j - 1] + 1).min(prev[j - 1] + cost);
            if i > 1 && j > 1 && a[i - 1] == b[j - 2] && a[i - 2] == b[j - 1] {
                d = d.min(before[j - 2] + 1);
            }
            cur[j] = d;
        }
        std::mem::swap(&mut before, &mut prev);
        std::mem::swap(&mut prev, &mut cur);
    }
    prev[b.len()]
}

/// The closest candidate to `name`, if it is close enough to be a likely typo.
pub fn nearest<'a>(name: &str, candidates: impl IntoIterator<Item = &'a str>) -> Option<&'a str> {
    let lower = name.to_lowercase();
    let name_len = name.chars().count();
    let mut best: Option<(usize, &str)> = None;
    for cand in candidates {
        // About one edit in three characters; a one-letter name is
        // matched only up to case, since every other letter is one edit away.
        let cand_len = cand.chars().count();
        let longest = name_len.max(cand_len);
        let limit = if longest <= 1 {
            0
        } else {
            (longest / 3).max(1)
        };
        // The distance is at least the difference in length: skip the
        // quadratic comparison when that alone is too far.
        if name_len.abs_diff(cand_len) > limit {
            continue;
        }
        let d = edit_distance(&lower, &cand.to_lowercase());
        if d <= limit && best.is_none_or(|(bd, bc)| d < bd || (d == bd && cand < bc)) {
            best = Some((d, cand));
        }
    }
    best.map(|(_, c)| c)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn edit_distance_counts_swaps_as_one() {
        assert_eq!(edit_distance("ocaen", "ocean"), 1);
        assert_eq!(edit_distance("kitten", "sitting"), 3);
        assert_eq!(edit_distance("", "abc"), 3);
        assert_eq!(edit_distance("abc", ""), 3);
        assert_eq!(edit_distance("same", "same"), 0);
        assert_eq!(edit_distance("ab", "ba"), 1);
    }

    #[test]
    fn nearest_suggests_close_names_only() {
        let names = ["ocean", "mantle", "Gyr", "K", "kg"];
        assert_eq!(nearest("ocaen", names), Some("ocean"));
        assert_eq!(nearest("mantel", names), Some("mantle"));
        assert_eq!(nearest("Gyrs", names), Some("Gyr"));
        assert_eq!(nearest("k", names), Some("K"));
        assert_eq!(nearest("e", ["%", "g", "t"]), None);
        assert_eq!(nearest("plate", names), None);
    }
}
