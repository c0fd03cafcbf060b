//! Source files and byte spans into them.

use std::path::PathBuf;
use std::sync::Arc;

/// A byte range in one source file of a [`Sources`] set.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Default)]
pub struct Span {
    pub file: u32,
    pub start: u32,
    pub end: u32,
}

impl Span {
    pub fn new(file: u32, start: usize, end: usize) -> Span {
        Span {
            file,
            start: start as u32,
            end: end as u32,
        }
    }

    /// The smallest span covering both.
    pub fn join(self, other: Span) -> Span {
        Span {
            file: self.file,
            start: self.start.min(other.start),
            end: self.end.max(other.end),
        }
    }

    pub fn len(self) -> usize {
        (self.end - self.start) as usize
    }

    pub fn is_empty(self) -> bool {
        self.end == self.start
    }
}

/// One source file: its display name (relative to the project root where
/// possible), its location on disk and its text.
#[derive(Debug, Clone)]
pub struct SourceFile {
    pub name: String,
    pub path: PathBuf,
    pub text: Arc<String>,
}

/// Every file read for one scenario, indexed by [`Span::file`].
#[derive(Debug, Clone, Default)]
pub struct Sources {
    pub files: Vec<SourceFile>,
}

impl Sources {
    pub fn add(&mut self, name: String, path: PathBuf, text: String) -> u32 {
        self.files.push(SourceFile {
            name,
            path,
            text: Arc::new(text),
        });
        (self.files.len() - 1) as u32
    }

    pub fn get(&self, file: u32) -> &SourceFile {
        &self.files[file as usize]
    }

    pub fn slice(&self, span: Span) -> &str {
        &self.get(span.file).text[span.start as usize..span.end as usize]
    }

    /// 1-based line and column of a span's start.
    pub fn line_col(&self, span: Span) -> (usize, usize) {
        let text = &self.get(span.file).text;
        let upto = &text[..(span.start as usize).min(text.len())];
        let line = upto.matches('\n').count() + 1;
        let col = upto.rsplit('\n').next().map_or(0, |l| l.chars().count()) + 1;
        (line, col)
    }
}
