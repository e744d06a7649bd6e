//! formula text → syntax tree.
//!
//! Owns: the lexer and the recursive-descent parser of Kiln's formula language, the syntax
//! tree ([`Program`], [`Expr`]) with byte spans into the source, and the limits on length and
//! nesting depth that keep parsing and every later recursive pass off the end of the stack.
//! Must not: resolve names, know about unknowns, data or functions (that is `resolve`).
//!
//! Grammar (`^` is right-associative and binds tighter than unary minus):
//! ```text
//! program  := ("let" NAME "=" expr ";")* expr
//! expr     := term (("+" | "-") term)*
//! term     := unary (("*" | "/") unary)*
//! unary    := ("-" | "+") unary | power
//! power    := primary ("^" unary)?
//! primary  := NUMBER | NAME | NAME "[" expr "]" | NAME "(" [arg ("," arg)*] ")" | "(" expr ")"
//! arg      := NAME "=" expr ".." expr      (a range; only as the first argument)
//!           | expr
//! ```
//! `name[i]` picks element `i` (1-based) of a vector unknown; `sum(k = 1..K, body)` and
//! `logsumexp(k = 1..K, body)` run `k` over a range of whole numbers (both ends included);
//! `resolve` decides where each may stand.
//! `#` starts a comment that runs to the end of the line; newlines are whitespace.

use crate::common::error::{ErrorKind, KilnError, Location};

/// Longest formula accepted, in bytes.
pub const MAX_FORMULA_BYTES: usize = 100_000;
/// Deepest syntax tree accepted (parentheses, calls, operator chains all count).
pub const MAX_DEPTH: usize = 400;

/// A byte range in the formula text.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct Span {
    pub start: usize,
    pub end: usize,
}

impl Span {
    pub fn to(self, other: Span) -> Span {
        Span {
            start: self.start.min(other.start),
            end: self.end.max(other.end),
        }
    }
}

#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum UnaryOp {
    Neg,
}

#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum BinaryOp {
    Add,
    Sub,
    Mul,
    Div,
    Pow,
}

#[derive(Clone, Debug, PartialEq)]
pub enum ExprKind {
    Number(f64),
    Name(String),
    Unary(UnaryOp, Box<Expr>),
    Binary(BinaryOp, Box<Expr>, Box<Expr>),
    Call {
        name: String,
        name_span: Span,
        args: Vec<Expr>,
    },
    /// `name[index]`: an element of a vector unknown.
    Index {
        name: String,
        name_span: Span,
        index: Box<Expr>,
    },
    /// `var = from..to`: a range of whole numbers, as the first argument of a call.
    Range {
        var: String,
        var_span: Span,
        from: Box<Expr>,
        to: Box<Expr>,
    },
}

#[derive(Clone, Debug, PartialEq)]
pub struct Expr {
    pub kind: ExprKind,
    pub span: Span,
    /// Height of this subtree (a leaf has depth 1).
    pub depth: usize,
}

#[derive(Clone, Debug, PartialEq)]
pub struct Let {
    pub name: String,
    pub name_span: Span,
    pub value: Expr,
}

/// A parsed formula: definitions, then the expression whose value is the energy or log density.
#[derive(Clone, Debug, PartialEq)]
pub struct Program {
    pub lets: Vec<Let>,
    pub body: Expr,
}

#[derive(Clone, Debug, PartialEq)]
enum Tok {
    Number(f64),
    Name(String),
    Let,
    Sym(char),
    /// `..`
    DotDot,
    End,
}

#[derive(Clone, Debug)]
struct Token {
    tok: Tok,
    span: Span,
}

/// A formula error at `span` of `text`; `source` names the spec field.
pub fn error_at(source: &str, text: &str, span: Span, message: impl Into<String>) -> KilnError {
    KilnError::new(ErrorKind::Formula, message)
        .at(Location::in_text(source, text, span.start, span.end))
}

fn describe(tok: &Tok) -> String {
    match tok {
        Tok::Number(_) => "a number".into(),
        Tok::Name(n) => format!("the name `{n}`"),
        Tok::Let => "`let`".into(),
        Tok::Sym(c) => format!("`{c}`"),
        Tok::DotDot => "`..`".into(),
        Tok::End => "the end of the formula".into(),
    }
}

fn lex(source: &str, text: &str) -> Result<Vec<Token>, KilnError> {
    let bytes = text.as_bytes();
    let mut out = Vec::new();
    let mut i = 0;
    while i < bytes.len() {
        let c = bytes[i];
        if c.is_ascii_whitespace() {
            i += 1;
        } else if c == b'#' {
            while i < bytes.len() && bytes[i] != b'\n' {
                i += 1;
            }
        } else if c.is_ascii_digit()
            || (c == b'.' && bytes.get(i + 1).is_some_and(|b| b.is_ascii_digit()))
        {
            let start = i;
            while i < bytes.len() && bytes[i].is_ascii_digit() {
                i += 1;
            }
            if i < bytes.len() && bytes[i] == b'.' && bytes.get(i + 1) != Some(&b'.') {
                i += 1;
                while i < bytes.len() && bytes[i].is_ascii_digit() {
                    i += 1;
                }
            }
            let mut bad_exponent = false;
            if i < bytes.len() && (bytes[i] == b'e' || bytes[i] == b'E') {
                let save = i;
                i += 1;
                if i < bytes.len() && (bytes[i] == b'+' || bytes[i] == b'-') {
                    i += 1;
                }
                if i < bytes.len() && bytes[i].is_ascii_digit() {
                    while i < bytes.len() && bytes[i].is_ascii_digit() {
                        i += 1;
                    }
                } else {
                    bad_exponent = true;
                    i = i.max(save + 1);
                }
            }
            // A number runs into letters, digits or a second point: `1.2.3`, `2x`, `1e`.
            let mut end = i;
            while end < bytes.len() {
                let b = bytes[end];
                let dot_dot = b == b'.' && bytes.get(end + 1) == Some(&b'.');
                if dot_dot || !(b.is_ascii_alphanumeric() || b == b'_' || b == b'.') {
                    break;
                }
                end += 1;
            }
            let span = Span { start, end };
            if bad_exponent || end > i {
                let shown = &text[start..end];
                let hint = if bad_exponent {
                    "write an exponent with digits, as in `1e-3`".to_string()
                } else if text[i..end].starts_with('.') {
                    "a number has at most one decimal point".to_string()
                } else {
                    format!(
                        "put an operator between a number and a name, as in `{}*{}`",
                        &text[start..i],
                        &text[i..end]
                    )
                };
                return Err(
                    error_at(source, text, span, format!("malformed number `{shown}`"))
                        .with_hint(hint),
                );
            }
            let value: f64 = text[start..i].parse().map_err(|_| {
                error_at(
                    source,
                    text,
                    span,
                    format!("malformed number `{}`", &text[start..i]),
                )
            })?;
            if !value.is_finite() {
                return Err(error_at(
                    source,
                    text,
                    span,
                    format!("the number `{}` is too large to represent", &text[start..i]),
                )
                .with_hint("numbers must be finite, below about 1.8e308"));
            }
            out.push(Token {
                tok: Tok::Number(value),
                span,
            });
        } else if c.is_ascii_alphabetic() || c == b'_' {
            let start = i;
            while i < bytes.len() && (bytes[i].is_ascii_alphanumeric() || bytes[i] == b'_') {
                i += 1;
            }
            let word = &text[start..i];
            let tok = if word == "let" {
                Tok::Let
            } else {
                Tok::Name(word.to_string())
            };
            out.push(Token {
                tok,
                span: Span { start, end: i },
            });
        } else if c == b'.' && bytes.get(i + 1) == Some(&b'.') {
            out.push(Token {
                tok: Tok::DotDot,
                span: Span {
                    start: i,
                    end: i + 2,
                },
            });
            i += 2;
        } else if b"+-*/^(),;=[]".contains(&c) {
            out.push(Token {
                tok: Tok::Sym(c as char),
                span: Span {
                    start: i,
                    end: i + 1,
                },
            });
            i += 1;
        } else {
            let ch = text[i..].chars().next().unwrap_or('?');
            let span = Span {
                start: i,
                end: i + ch.len_utf8(),
            };
            let hint = match ch {
                '*' | '×' => "multiplication is `*`".to_string(),
                '{' | '}' => "group with round parentheses `(` `)`".to_string(),
                '!' | '&' | '|' | '<' | '>' | '?' => {
                    "the formula language has no comparisons or logic; use min, max or abs"
                        .to_string()
                }
                '−' => "use the ASCII minus sign `-`".to_string(),
                _ => "allowed are numbers, names, + - * / ^ ( ) [ ] , ; = .. and # comments"
                    .to_string(),
            };
            return Err(
                error_at(source, text, span, format!("unexpected character `{ch}`"))
                    .with_hint(hint),
            );
        }
    }
    out.push(Token {
        tok: Tok::End,
        span: Span {
            start: text.len(),
            end: text.len(),
        },
    });
    Ok(out)
}

struct Parser<'a> {
    source: &'a str,
    text: &'a str,
    toks: Vec<Token>,
    pos: usize,
    nesting: usize,
}

impl<'a> Parser<'a> {
    fn peek(&self) -> &Token {
        &self.toks[self.pos.min(self.toks.len() - 1)]
    }
    fn bump(&mut self) -> Token {
        let t = self.peek().clone();
        if self.pos < self.toks.len() - 1 {
            self.pos += 1;
        }
        t
    }
    fn is_sym(&self, c: char) -> bool {
        self.peek().tok == Tok::Sym(c)
    }
    fn err(&self, span: Span, message: impl Into<String>) -> KilnError {
        error_at(self.source, self.text, span, message)
    }
    fn expect_sym(&mut self, c: char, context: &str) -> Result<Span, KilnError> {
        if self.is_sym(c) {
            Ok(self.bump().span)
        } else {
            let t = self.peek();
            Err(self.err(
                t.span,
                format!("expected `{c}` {context}, found {}", describe(&t.tok)),
            ))
        }
    }
    fn node(&self, kind: ExprKind, span: Span, depth: usize) -> Result<Expr, KilnError> {
        if depth > MAX_DEPTH {
            return Err(self
                .err(
                    span,
                    format!("the formula is nested too deeply (more than {MAX_DEPTH} levels)"),
                )
                .with_hint("split it into parts with `let name = …;` definitions"));
        }
        Ok(Expr { kind, span, depth })
    }
    fn enter(&mut self) -> Result<(), KilnError> {
        self.nesting += 1;
        if self.nesting > MAX_DEPTH {
            let span = self.peek().span;
            return Err(self
                .err(
                    span,
                    format!("the formula is nested too deeply (more than {MAX_DEPTH} levels)"),
                )
                .with_hint("split it into parts with `let name = …;` definitions"));
        }
        Ok(())
    }

    fn program(&mut self) -> Result<Program, KilnError> {
        let mut lets = Vec::new();
        while self.peek().tok == Tok::Let {
            let let_span = self.bump().span;
            let t = self.bump();
            let (name, name_span) = match t.tok {
                Tok::Name(n) => (n, t.span),
                other => {
                    return Err(self
                        .err(
                            t.span,
                            format!("expected a name after `let`, found {}", describe(&other)),
                        )
                        .with_hint("write `let name = expression;`"))
                }
            };
            self.expect_sym('=', &format!("after `let {name}`"))?;
            let value = self.expr()?;
            if !self.is_sym(';') {
                let t = self.peek();
                return Err(self
                    .err(
                        t.span,
                        format!(
                            "expected `;` to end the definition of `{name}`, found {}",
                            describe(&t.tok)
                        ),
                    )
                    .with_hint(format!("end it with a semicolon: `let {name} = …;`")));
            }
            self.bump();
            let _ = let_span;
            lets.push(Let {
                name,
                name_span,
                value,
            });
        }
        if self.peek().tok == Tok::End {
            let span = self.peek().span;
            let message = if lets.is_empty() {
                "the formula is empty"
            } else {
                "the formula has definitions but no final expression"
            };
            return Err(self
                .err(span, message)
                .with_hint("end the formula with the expression to use, for example `0.5 * x^2`"));
        }
        let body = self.expr()?;
        let t = self.peek().clone();
        match t.tok {
            Tok::End => Ok(Program { lets, body }),
            Tok::Sym(')') => Err(self
                .err(t.span, "unmatched `)`")
                .with_hint("remove it or add the `(` it closes")),
            Tok::Sym(';') => Err(self
                .err(t.span, "unexpected `;` after the final expression")
                .with_hint(
                    "only `let` definitions end with `;`; the final expression stands alone",
                )),
            Tok::Let => Err(self
                .err(
                    t.span,
                    "`let` definitions must come before the final expression",
                )
                .with_hint("end the previous part with `;` or move the definition up")),
            other => Err(self
                .err(
                    t.span,
                    format!(
                        "expected an operator or the end of the formula, found {}",
                        describe(&other)
                    ),
                )
                .with_hint("is an operator such as `*` or `+` missing?")),
        }
    }

    fn expr(&mut self) -> Result<Expr, KilnError> {
        self.enter()?;
        let mut lhs = self.term()?;
        loop {
            let op = if self.is_sym('+') {
                BinaryOp::Add
            } else if self.is_sym('-') {
                BinaryOp::Sub
            } else {
                break;
            };
            self.bump();
            let rhs = self.term()?;
            let span = lhs.span.to(rhs.span);
            let depth = 1 + lhs.depth.max(rhs.depth);
            lhs = self.node(
                ExprKind::Binary(op, Box::new(lhs), Box::new(rhs)),
                span,
                depth,
            )?;
        }
        self.nesting -= 1;
        Ok(lhs)
    }

    fn term(&mut self) -> Result<Expr, KilnError> {
        let mut lhs = self.unary()?;
        loop {
            let op = if self.is_sym('*') {
                BinaryOp::Mul
            } else if self.is_sym('/') {
                BinaryOp::Div
            } else {
                break;
            };
            self.bump();
            let rhs = self.unary()?;
            let span = lhs.span.to(rhs.span);
            let depth = 1 + lhs.depth.max(rhs.depth);
            lhs = self.node(
                ExprKind::Binary(op, Box::new(lhs), Box::new(rhs)),
                span,
                depth,
            )?;
        }
        Ok(lhs)
    }

    fn unary(&mut self) -> Result<Expr, KilnError> {
        if self.is_sym('-') || self.is_sym('+') {
            self.enter()?;
            let t = self.bump();
            let inner = self.unary()?;
            self.nesting -= 1;
            if t.tok == Tok::Sym('+') {
                return Ok(inner);
            }
            let span = t.span.to(inner.span);
            let depth = inner.depth + 1;
            return self.node(ExprKind::Unary(UnaryOp::Neg, Box::new(inner)), span, depth);
        }
        self.power()
    }

    fn power(&mut self) -> Result<Expr, KilnError> {
        let base = self.primary()?;
        if self.is_sym('^') {
            self.enter()?;
            self.bump();
            let exponent = self.unary()?;
            self.nesting -= 1;
            let span = base.span.to(exponent.span);
            let depth = 1 + base.depth.max(exponent.depth);
            return self.node(
                ExprKind::Binary(BinaryOp::Pow, Box::new(base), Box::new(exponent)),
                span,
                depth,
            );
        }
        Ok(base)
    }

    fn primary(&mut self) -> Result<Expr, KilnError> {
        let t = self.bump();
        match t.tok {
            Tok::Number(v) => self.node(ExprKind::Number(v), t.span, 1),
            Tok::Name(name) => {
                if self.is_sym('[') {
                    self.enter()?;
                    self.bump();
                    let index = self.expr()?;
                    if !self.is_sym(']') {
                        let u = self.peek().clone();
                        return Err(self
                            .err(u.span, format!("expected `]` to close the index of `{name}`, found {}", describe(&u.tok)))
                            .with_hint(format!("write `{name}[k]` with one whole-number index")));
                    }
                    let close = self.bump().span;
                    self.nesting -= 1;
                    let depth = 1 + index.depth;
                    return self.node(
                        ExprKind::Index { name, name_span: t.span, index: Box::new(index) },
                        t.span.to(close),
                        depth,
                    );
                }
                if !self.is_sym('(') {
                    return self.node(ExprKind::Name(name), t.span, 1);
                }
                self.enter()?;
                self.bump();
                let mut args = Vec::new();
                if !self.is_sym(')') {
                    loop {
                        if args.is_empty() && self.range_ahead() {
                            args.push(self.range()?);
                        } else {
                            args.push(self.expr()?);
                        }
                        if self.is_sym(',') {
                            self.bump();
                            continue;
                        }
                        if self.is_sym(')') {
                            break;
                        }
                        let u = self.peek().clone();
                        return Err(self
                            .err(u.span, format!("expected `,` or `)` in the call of `{name}`, found {}", describe(&u.tok)))
                            .with_hint("separate arguments with commas and close the call with `)`"));
                    }
                }
                let close = self.bump().span;
                self.nesting -= 1;
                let depth = 1 + args.iter().map(|a| a.depth).max().unwrap_or(0);
                self.node(
                    ExprKind::Call { name, name_span: t.span, args },
                    t.span.to(close),
                    depth,
                )
            }
            Tok::Sym('(') => {
                self.enter()?;
                let inner = self.expr()?;
                if !self.is_sym(')') {
                    let u = self.peek().clone();
                    let hint = if u.tok == Tok::End {
                        "add the closing `)`".to_string()
                    } else {
                        "is an operator missing, or a `)`?".to_string()
                    };
                    return Err(self
                        .err(u.span, format!("expected `)` to close the `(` at column {}, found {}", self.column_of(t.span), describe(&u.tok)))
                        .with_hint(hint));
                }
                self.bump();
                self.nesting -= 1;
                Ok(inner)
            }
            Tok::Let => Err(self
                .err(t.span, "`let` is only allowed at the start of the formula, before the final expression")
                .with_hint("define names first: `let a = …; let b = …; a + b`")),
            Tok::End => Err(self
                .err(t.span, "the formula ends where a value was expected")
                .with_hint("complete the expression")),
            Tok::DotDot => Err(self
                .err(t.span, "unexpected `..`")
                .with_hint("`..` only stands in a range, as in `sum(k = 1..3, mu[k])`")),
            Tok::Sym(c) => {
                let hint = match c {
                    ')' => "there is nothing inside the parentheses, or a `(` is missing",
                    '=' => "`=` is only used in `let name = …;` and in a range `k = 1..3`",
                    '[' | ']' => "`[…]` follows a vector's name to pick an element, as in `mu[2]`; group with round parentheses `(` `)`",
                    _ => "a number, a name, a call or `(` was expected here",
                };
                Err(self.err(t.span, format!("unexpected `{c}`")).with_hint(hint))
            }
        }
    }

    /// Whether a range `k = a..b` starts here (a name followed by `=`).
    fn range_ahead(&self) -> bool {
        matches!(self.peek().tok, Tok::Name(_))
            && self.toks.get(self.pos + 1).map(|t| &t.tok) == Some(&Tok::Sym('='))
    }

    /// `k = from..to`.
    fn range(&mut self) -> Result<Expr, KilnError> {
        let t = self.bump();
        let Tok::Name(var) = t.tok else {
            return Err(self.err(t.span, "expected a name"));
        };
        self.bump();
        let from = self.expr()?;
        if self.peek().tok != Tok::DotDot {
            let u = self.peek().clone();
            return Err(self
                .err(
                    u.span,
                    format!(
                        "expected `..` in the range of `{var}`, found {}",
                        describe(&u.tok)
                    ),
                )
                .with_hint(format!(
                    "write the range as `{var} = 1..3` (both ends included)"
                )));
        }
        self.bump();
        let to = self.expr()?;
        let span = t.span.to(to.span);
        let depth = 1 + from.depth.max(to.depth);
        self.node(
            ExprKind::Range {
                var,
                var_span: t.span,
                from: Box::new(from),
                to: Box::new(to),
            },
            span,
            depth,
        )
    }

    fn column_of(&self, span: Span) -> usize {
        Location::in_text(self.source, self.text, span.start, span.end).column
    }
}

/// Parses a formula. `source` names the field it came from, for messages.
pub fn parse(source: &str, text: &str) -> Result<Program, KilnError> {
    if text.len() > MAX_FORMULA_BYTES {
        return Err(KilnError::new(
            ErrorKind::Limit,
            format!(
                "the `{source}` formula is {} bytes long; the limit is {MAX_FORMULA_BYTES}",
                text.len()
            ),
        )
        .with_hint("move repeated terms into data columns and `sum(…)`"));
    }
    let toks = lex(source, text)?;
    let mut p = Parser {
        source,
        text,
        toks,
        pos: 0,
        nesting: 0,
    };
    p.program()
}

#[cfg(test)]
mod tests {
    use super::*;

    fn show(e: &Expr) -> String {
        match &e.kind {
            ExprKind::Number(v) => format!("{v}"),
            ExprKind::Name(n) => n.clone(),
            ExprKind::Unary(_, a) => format!("(-{})", show(a)),
            ExprKind::Binary(op, a, b) => {
                let o = match op {
                    BinaryOp::Add => "+",
                    BinaryOp::Sub => "-",
                    BinaryOp::Mul => "*",
                    BinaryOp::Div => "/",
                    BinaryOp::Pow => "^",
                };
                format!("({}{o}{})", show(a), show(b))
            }
            ExprKind::Call { name, args, .. } => {
                format!(
                    "{name}({})",
                    args.iter().map(show).collect::<Vec<_>>().join(",")
                )
            }
            ExprKind::Index { name, index, .. } => format!("{name}[{}]", show(index)),
            ExprKind::Range { var, from, to, .. } => {
                format!("{var}={}..{}", show(from), show(to))
            }
        }
    }
    fn p(text: &str) -> String {
        show(&parse("energy", text).unwrap().body)
    }

    #[test]
    fn precedence_and_associativity() {
        assert_eq!(p("-x^2"), "(-(x^2))");
        assert_eq!(p("2^3^2"), "(2^(3^2))");
        assert_eq!(p("a-b-c"), "((a-b)-c)");
        assert_eq!(p("a/b*c"), "((a/b)*c)");
        assert_eq!(p("a+b*c^d"), "(a+(b*(c^d)))");
        assert_eq!(p("2^-x"), "(2^(-x))");
        assert_eq!(p("1e-3 * .5 + 2.0"), "((0.001*0.5)+2)");
        assert_eq!(p("f(a, b + 1)"), "f(a,(b+1))");
        assert_eq!(p("# comment\n x # more\n + 1"), "(x+1)");
        assert_eq!(p("mu[g] + mu[k+1]"), "(mu[g]+mu[(k+1)])");
        assert_eq!(p("sum(k = 1..3, mu[k]^2)"), "sum(k=1..3,(mu[k]^2))");
        assert_eq!(p("logsumexp(j=1..K, w[j])"), "logsumexp(j=1..K,w[j])");
        assert_eq!(p("1.5 + .5"), "(1.5+0.5)");
    }

    #[test]
    fn ranges_and_indexes_report_their_faults() {
        let e = parse("energy", "sum(k = 1, 3)").unwrap_err();
        assert!(e.message.contains("expected `..`"), "{}", e.message);
        let e = parse("energy", "mu[1").unwrap_err();
        assert!(e.message.contains("expected `]`"), "{}", e.message);
        let e = parse("energy", "1 .. 2").unwrap_err();
        assert!(e.message.contains("`..`"), "{}", e.message);
    }

    #[test]
    fn lets_come_first() {
        let prog = parse("energy", "let a = x^2;\nlet b = a + 1;\na * b").unwrap();
        assert_eq!(prog.lets.len(), 2);
        assert_eq!(prog.lets[1].name, "b");
        let e = parse("energy", "x + 1; let a = 2; a").unwrap_err();
        assert!(e.message.contains("unexpected `;`"), "{}", e.message);
    }

    #[test]
    fn errors_point_at_the_fault() {
        let e = parse("energy", "x +* 2").unwrap_err();
        let loc = e.location.unwrap();
        assert_eq!((loc.line, loc.column), (1, 4));
        let e = parse("energy", "exp(x").unwrap_err();
        assert!(e.message.contains("expected `,` or `)`"), "{}", e.message);
        let e = parse("energy", "1.2.3 + x").unwrap_err();
        assert!(e.message.contains("malformed number `1.2.3`"));
        let e = parse("energy", "2x").unwrap_err();
        assert!(e.hint.unwrap().contains("`2*x`"));
        let e = parse("energy", "1e+").unwrap_err();
        assert!(e.message.contains("malformed number"));
        let e = parse("energy", "  # only a comment").unwrap_err();
        assert_eq!(e.message, "the formula is empty");
        let e = parse("energy", "1e999").unwrap_err();
        assert!(e.message.contains("too large"));
    }

    #[test]
    fn deep_nesting_is_an_error_not_a_crash() {
        let deep = format!("{}x{}", "(".repeat(5000), ")".repeat(5000));
        let e = parse("energy", &deep).unwrap_err();
        assert!(e.message.contains("nested too deeply"));
        let long_chain = vec!["x"; 2000].join("+");
        let e = parse("energy", &long_chain).unwrap_err();
        assert!(e.message.contains("nested too deeply"));
        let minus = format!("{}x", "-".repeat(5000));
        assert!(parse("energy", &minus).is_err());
    }
}
