//! The syntax tree: what the text says, with spans, and nothing about what it
//! means. Units are kept as written (names with integer powers).

use crate::span::Span;

#[derive(Debug, Clone, PartialEq)]
pub struct Ident {
    pub text: String,
    pub span: Span,
}

/// One parsed file.
#[derive(Debug, Clone, PartialEq)]
pub struct SyntaxFile {
    pub entries: Vec<Entry>,
}

/// A line of the file: a statement (with an optional trailing comment) or a
/// comment standing alone. `line` is the 0-based line where it starts, which
/// the formatter uses to keep single blank lines between groups.
#[derive(Debug, Clone, PartialEq)]
pub struct Entry {
    pub line: usize,
    pub kind: EntryKind,
    pub trailing: Option<String>,
}

#[derive(Debug, Clone, PartialEq)]
pub enum EntryKind {
    Comment(String),
    Stmt(Box<Stmt>),
}

#[derive(Debug, Clone, PartialEq)]
pub struct Stmt {
    pub kind: StmtKind,
    pub span: Span,
}

#[derive(Debug, Clone, PartialEq)]
pub enum StmtKind {
    Scenario {
        name: Ident,
        title: Option<StringLit>,
    },
    Span {
        from: Expr,
        to: Expr,
    },
    Report {
        every: Expr,
    },
    Solver {
        key: Ident,
        value: Expr,
    },
    Include {
        path: StringLit,
    },
    Const {
        name: Ident,
        value: Expr,
    },
    Param {
        name: Ident,
        value: Expr,
    },
    Table {
        name: Ident,
        path: StringLit,
        x_unit: UnitText,
        y_unit: UnitText,
    },
    Reservoir {
        name: Ident,
        initial: Expr,
        clauses: Vec<Clause>,
    },
    State {
        name: Ident,
        initial: Expr,
        clauses: Vec<Clause>,
    },
    Let {
        name: Ident,
        value: Expr,
    },
    Output {
        name: Ident,
        value: Expr,
        unit: Option<UnitText>,
    },
    Flux {
        name: Ident,
        from: Ident,
        to: Ident,
        rate: Expr,
    },
    Event {
        name: Ident,
        condition: Expr,
    },
    Expect {
        subject: Expr,
        check: ExpectCheck,
    },
    Stage {
        name: Ident,
        from: Expr,
        to: Expr,
        body: Option<StageBody>,
    },
    Set {
        name: Ident,
        value: Expr,
    },
    /// `ensemble { ... }`: which parameters vary and how.
    Ensemble {
        body: StageBody,
    },
    /// `vary NAME ~ DIST(ARGS), min = X, max = Y` inside an ensemble.
    Vary {
        name: Ident,
        dist: Expr,
        clauses: Vec<Clause>,
    },
    /// `NAME = VALUE` inside an ensemble (members, seed).
    Option {
        key: Ident,
        value: Expr,
    },
}

/// The body of a block (`stage ... {` or `ensemble {`) up to its `}`.
#[derive(Debug, Clone, PartialEq)]
pub struct StageBody {
    /// Comment after the opening brace.
    pub open_comment: Option<String>,
    pub entries: Vec<Entry>,
    /// Line of the closing brace (for blank-line layout).
    pub close_line: usize,
}

#[derive(Debug, Clone, PartialEq)]
pub struct Clause {
    pub key: Ident,
    pub value: Expr,
}

#[derive(Debug, Clone, PartialEq)]
pub struct StringLit {
    /// The decoded text (escapes resolved).
    pub value: String,
    pub span: Span,
}

/// A unit as written: `kg/m^3` is factors kg^1, m^-3.
#[derive(Debug, Clone, PartialEq)]
pub struct UnitText {
    pub text: String,
    pub factors: Vec<UnitFactor>,
    pub span: Span,
}

#[derive(Debug, Clone, PartialEq)]
pub struct UnitFactor {
    pub name: String,
    pub power: i32,
    pub span: Span,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum CmpOp {
    Lt,
    Le,
    Gt,
    Ge,
}

impl CmpOp {
    pub fn symbol(self) -> &'static str {
        match self {
            CmpOp::Lt => "<",
            CmpOp::Le => "<=",
            CmpOp::Gt => ">",
            CmpOp::Ge => ">=",
        }
    }
}

#[derive(Debug, Clone, PartialEq)]
pub enum ExpectCheck {
    Target { at: Expr, value: Expr, sigma: Expr },
    Range { at: Expr, low: Expr, high: Expr },
    Bound { at: Expr, op: CmpOp, value: Expr },
    Event { before: bool, age: Expr },
}

#[derive(Debug, Clone, PartialEq)]
pub struct Expr {
    pub kind: ExprKind,
    pub span: Span,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum BinOp {
    Or,
    And,
    Eq,
    Ne,
    Lt,
    Le,
    Gt,
    Ge,
    Add,
    Sub,
    Mul,
    Div,
    Pow,
}

impl BinOp {
    /// Every operator, in declaration order.
    pub const ALL: [BinOp; 13] = [
        BinOp::Or,
        BinOp::And,
        BinOp::Eq,
        BinOp::Ne,
        BinOp::Lt,
        BinOp::Le,
        BinOp::Gt,
        BinOp::Ge,
        BinOp::Add,
        BinOp::Sub,
        BinOp::Mul,
        BinOp::Div,
        BinOp::Pow,
    ];

    pub fn symbol(self) -> &'static str {
        match self {
            BinOp::Or => "or",
            BinOp::And => "and",
            BinOp::Eq => "==",
            BinOp::Ne => "!=",
            BinOp::Lt => "<",
            BinOp::Le => "<=",
            BinOp::Gt => ">",
            BinOp::Ge => ">=",
            BinOp::Add => "+",
            BinOp::Sub => "-",
            BinOp::Mul => "*",
            BinOp::Div => "/",
            BinOp::Pow => "^",
        }
    }

    /// Binding strength; higher binds tighter. Matches the Pratt table in the parser.
    pub fn precedence(self) -> u8 {
        match self {
            BinOp::Or => 1,
            BinOp::And => 2,
            BinOp::Eq | BinOp::Ne | BinOp::Lt | BinOp::Le | BinOp::Gt | BinOp::Ge => 4,
            BinOp::Add | BinOp::Sub => 5,
            BinOp::Mul | BinOp::Div => 6,
            BinOp::Pow => 8,
        }
    }

    pub fn is_comparison(self) -> bool {
        matches!(
            self,
            BinOp::Eq | BinOp::Ne | BinOp::Lt | BinOp::Le | BinOp::Gt | BinOp::Ge
        )
    }
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum UnOp {
    Neg,
    Not,
}

impl UnOp {
    pub fn precedence(self) -> u8 {
        match self {
            UnOp::Not => 3,
            UnOp::Neg => 7,
        }
    }
}

#[derive(Debug, Clone, PartialEq)]
pub enum ExprKind {
    /// A number, with the text as written and an optional unit.
    Quantity {
        text: String,
        value: f64,
        unit: Option<UnitText>,
    },
    Name(Ident),
    Call {
        func: Ident,
        args: Vec<Expr>,
    },
    Unary {
        op: UnOp,
        operand: Box<Expr>,
    },
    Binary {
        op: BinOp,
        lhs: Box<Expr>,
        rhs: Box<Expr>,
    },
    If {
        cond: Box<Expr>,
        then: Box<Expr>,
        otherwise: Box<Expr>,
    },
    Paren(Box<Expr>),
}
