//! The row predicates of `keep` and `drop`: a small language of our own.
//!
//! ```text
//! expr     := term ("or" term)*
//! term     := factor ("and" factor)*
//! factor   := "not" factor | "(" expr ")" | test
//! test     := value "is" ["not"] "blank"
//!           | value ["not"] "in" "(" value ("," value)* ")"
//!           | value "matches" STRING
//!           | value OP value            OP: =  !=  <  <=  >  >=
//! value    := COLUMN | `any column name` | 'text' | NUMBER
//! ```
//!
//! Keywords are case-blind. A bare word is a column name; a name with spaces or other signs is
//! written between backquotes. Text literals are in single quotes, a quote inside doubled
//! (`'o''neil'`). Comparisons are numeric, exactly on the digits, when both sides are plain
//! numbers (`12`, `-3.50`), and otherwise compare the text byte by byte (`=` and `!=` are exact
//! text equality). A blank cell (empty, or a declared null token) compares as empty text.
//! `matches` takes a regular expression (Rust `regex` syntax) that may match anywhere in the
//! value; anchor it with `^` and `$` to match the whole value.
//!
//! Errors name the 1-based character column of the predicate where they occur.
//!
//! Hostile input is bounded: parentheses and `not` may nest at most [`MAX_NESTING`] deep (a
//! refusal names the column where the limit is passed), chains of `and` and `or` are kept as
//! flat lists, so parsing is linear in the text and neither parsing, evaluating nor dropping a
//! predicate recurses deeper than the nesting.

use std::cmp::Ordering;

use regex::Regex;

use crate::error::{Error, Result};
use crate::table::profile::{cmp_numbers, number_shape};
use crate::table::RawRecord;

#[derive(Debug, Clone, PartialEq)]
enum Tok {
    Word(String),
    Quoted(String),
    Column(String),
    Number(String),
    Op(&'static str),
    LParen,
    RParen,
    Comma,
}

#[derive(Debug, Clone)]
struct Lexed {
    tok: Tok,
    /// 1-based character column where the token starts.
    col: usize,
}

/// How deep parentheses and `not` may nest. Far beyond any predicate written by hand; it keeps
/// the parser and the evaluator (which recurse once per level) well inside a thread's stack.
pub const MAX_NESTING: usize = 200;

fn err(text: &str, col: usize, what: &str) -> Error {
    // A long predicate is shown by the part around the column, so a refusal stays readable.
    let n = text.chars().count();
    let shown = if n <= 120 {
        text.to_string()
    } else {
        let from = col.saturating_sub(41);
        let part: String = text.chars().skip(from).take(80).collect();
        format!(
            "{}{part}{}",
            if from > 0 { "..." } else { "" },
            if from + 80 < n { "..." } else { "" }
        )
    };
    Error::usage(format!("predicate \"{shown}\", column {col}: {what}"))
}

fn lex(text: &str) -> Result<Vec<Lexed>> {
    let chars: Vec<char> = text.chars().collect();
    let mut out = Vec::new();
    let mut i = 0;
    while i < chars.len() {
        let c = chars[i];
        let col = i + 1;
        if c.is_whitespace() {
            i += 1;
            continue;
        }
        let tok = match c {
            '(' => {
                i += 1;
                Tok::LParen
            }
            ')' => {
                i += 1;
                Tok::RParen
            }
            ',' => {
                i += 1;
                Tok::Comma
            }
            '=' if chars.get(i + 1) == Some(&'=') => {
                return Err(err(
                    text,
                    col,
                    "\"==\" is not an operator here: equality is one \"=\" (e.g. status = 'test')",
                ))
            }
            '=' => {
                i += 1;
                Tok::Op("=")
            }
            '!' | '<' | '>' => {
                let next = chars.get(i + 1).copied();
                i += if next == Some('=') { 2 } else { 1 };
                match (c, next) {
                    ('!', Some('=')) => Tok::Op("!="),
                    ('<', Some('=')) => Tok::Op("<="),
                    ('>', Some('=')) => Tok::Op(">="),
                    ('<', _) => Tok::Op("<"),
                    ('>', _) => Tok::Op(">"),
                    _ => return Err(err(text, col, "'!' must be followed by '=' (not equal is !=)")),
                }
            }
            '\'' | '`' => {
                let mut s = String::new();
                let mut j = i + 1;
                loop {
                    match chars.get(j) {
                        None => {
                            return Err(err(
                                text,
                                col,
                                &format!("this {} is never closed", if c == '\'' { "text" } else { "column name" }),
                            ))
                        }
                        Some(&q) if q == c => {
                            if chars.get(j + 1) == Some(&c) {
                                s.push(c);
                                j += 2;
                            } else {
                                j += 1;
                                break;
                            }
                        }
                        Some(&ch) => {
                            s.push(ch);
                            j += 1;
                        }
                    }
                }
                i = j;
                if c == '\'' {
                    Tok::Quoted(s)
                } else {
                    Tok::Column(s)
                }
            }
            c if c.is_ascii_digit() || ((c == '-' || c == '+' || c == '.') && chars.get(i + 1).is_some_and(|d| d.is_ascii_digit() || *d == '.')) => {
                let mut j = i + 1;
                while j < chars.len() && (chars[j].is_ascii_digit() || chars[j] == '.') {
                    j += 1;
                }
                let s: String = chars[i..j].iter().collect();
                if number_shape(s.as_bytes()).is_none() {
                    return Err(err(text, col, &format!("\"{s}\" is not a number")));
                }
                i = j;
                Tok::Number(s)
            }
            c if c.is_alphabetic() || c == '_' => {
                let mut j = i + 1;
                while j < chars.len() && (chars[j].is_alphanumeric() || chars[j] == '_') {
                    j += 1;
                }
                let s: String = chars[i..j].iter().collect();
                i = j;
                Tok::Word(s)
            }
            other => {
                return Err(err(
                    text,
                    col,
                    &format!("unexpected '{other}'; write text in single quotes and odd column names in backquotes"),
                ))
            }
        };
        out.push(Lexed { tok, col });
    }
    Ok(out)
}

#[derive(Debug, Clone)]
enum Value {
    Column(usize),
    Literal(String),
}

#[derive(Debug, Clone)]
enum Node {
    /// Two or more alternatives, in order.
    Or(Vec<Node>),
    /// Two or more conditions, in order.
    And(Vec<Node>),
    Not(Box<Node>),
    Blank(Value),
    In(Value, Vec<Value>),
    Matches(Value, Regex),
    Cmp(Value, &'static str, Value),
}

/// A parsed predicate, bound to the columns of one table.
#[derive(Debug, Clone)]
pub struct Predicate {
    root: Node,
    text: String,
}

struct Parser<'a> {
    toks: Vec<Lexed>,
    at: usize,
    text: &'a str,
    /// The text's length in characters (the column just past its end is this + 1).
    n_chars: usize,
    /// Parentheses and `not` open around the current position.
    depth: usize,
    header: &'a [String],
}

fn is_kw(t: &Tok, kw: &str) -> bool {
    matches!(t, Tok::Word(w) if w.eq_ignore_ascii_case(kw))
}

const KEYWORDS: &[&str] = &["and", "or", "not", "is", "blank", "in", "matches"];

impl Parser<'_> {
    fn peek(&self) -> Option<&Lexed> {
        self.toks.get(self.at)
    }

    fn col(&self) -> usize {
        self.peek().map_or(self.n_chars + 1, |l| l.col)
    }

    /// One more level of nesting at `col`, refused past [`MAX_NESTING`].
    fn enter(&mut self, col: usize) -> Result<()> {
        self.depth += 1;
        if self.depth > MAX_NESTING {
            return Err(err(
                self.text,
                col,
                &format!("parentheses and \"not\" nest more than {MAX_NESTING} deep here; write the predicate with less nesting"),
            ));
        }
        Ok(())
    }

    fn eat_kw(&mut self, kw: &str) -> bool {
        if self.peek().is_some_and(|l| is_kw(&l.tok, kw)) {
            self.at += 1;
            true
        } else {
            false
        }
    }

    fn expect(&mut self, tok: Tok, what: &str) -> Result<()> {
        match self.peek() {
            Some(l) if l.tok == tok => {
                self.at += 1;
                Ok(())
            }
            _ => Err(err(self.text, self.col(), &format!("expected {what}"))),
        }
    }

    fn expr(&mut self) -> Result<Node> {
        let mut items = vec![self.term()?];
        while self.eat_kw("or") {
            items.push(self.term()?);
        }
        if items.len() == 1 {
            if let Some(only) = items.pop() {
                return Ok(only);
            }
        }
        Ok(Node::Or(items))
    }

    fn term(&mut self) -> Result<Node> {
        let mut items = vec![self.factor()?];
        while self.eat_kw("and") {
            items.push(self.factor()?);
        }
        if items.len() == 1 {
            if let Some(only) = items.pop() {
                return Ok(only);
            }
        }
        Ok(Node::And(items))
    }

    fn factor(&mut self) -> Result<Node> {
        let col = self.col();
        if self.eat_kw("not") {
            self.enter(col)?;
            let inner = self.factor()?;
            self.depth -= 1;
            return Ok(Node::Not(Box::new(inner)));
        }
        if self.peek().is_some_and(|l| l.tok == Tok::LParen) {
            self.enter(col)?;
            self.at += 1;
            let e = self.expr()?;
            self.expect(Tok::RParen, "')' to close the '('")?;
            self.depth -= 1;
            return Ok(e);
        }
        self.test()
    }

    fn value(&mut self) -> Result<Value> {
        let col = self.col();
        let Some(l) = self.peek().cloned() else {
            return Err(err(
                self.text,
                col,
                "expected a column name, a 'text' or a number",
            ));
        };
        self.at += 1;
        match l.tok {
            Tok::Quoted(s) | Tok::Number(s) => Ok(Value::Literal(s)),
            Tok::Word(w) if KEYWORDS.iter().any(|k| w.eq_ignore_ascii_case(k)) => Err(err(
                self.text,
                col,
                &format!("expected a column name, a 'text' or a number, found the word \"{w}\" (write `{w}` for a column of that name)"),
            )),
            Tok::Word(name) | Tok::Column(name) => match self.header.iter().position(|h| *h == name) {
                Some(i) => Ok(Value::Column(i)),
                None => Err(err(
                    self.text,
                    col,
                    &format!("no column \"{name}\"; the columns are: {}", self.header.join(", ")),
                )),
            },
            _ => Err(err(self.text, col, "expected a column name, a 'text' or a number")),
        }
    }

    fn test(&mut self) -> Result<Node> {
        let left = self.value()?;
        let col = self.col();
        if self.eat_kw("is") {
            let negate = self.eat_kw("not");
            if !self.eat_kw("blank") {
                return Err(err(
                    self.text,
                    self.col(),
                    "expected \"blank\" after \"is\"",
                ));
            }
            let n = Node::Blank(left);
            return Ok(if negate { Node::Not(Box::new(n)) } else { n });
        }
        let negate_in = self.eat_kw("not");
        if self.eat_kw("in") {
            self.expect(Tok::LParen, "'(' and a list of values after \"in\"")?;
            let mut items = vec![self.value()?];
            while self.peek().is_some_and(|l| l.tok == Tok::Comma) {
                self.at += 1;
                items.push(self.value()?);
            }
            self.expect(Tok::RParen, "',' or ')' in the list after \"in\"")?;
            let n = Node::In(left, items);
            return Ok(if negate_in { Node::Not(Box::new(n)) } else { n });
        }
        if negate_in {
            return Err(err(
                self.text,
                self.col(),
                "expected \"in\" after \"not\" here",
            ));
        }
        if self.eat_kw("matches") {
            let pcol = self.col();
            let Some(Lexed {
                tok: Tok::Quoted(pat),
                ..
            }) = self.peek().cloned()
            else {
                return Err(err(
                    self.text,
                    pcol,
                    "expected a 'regular expression' in single quotes after \"matches\"",
                ));
            };
            self.at += 1;
            let re = Regex::new(&pat).map_err(|e| {
                err(
                    self.text,
                    pcol,
                    &format!(
                        "not a valid regular expression: {}",
                        e.to_string().lines().last().unwrap_or("")
                    ),
                )
            })?;
            return Ok(Node::Matches(left, re));
        }
        match self.peek().map(|l| l.tok.clone()) {
            Some(Tok::Op(op)) => {
                self.at += 1;
                let right = self.value()?;
                Ok(Node::Cmp(left, op, right))
            }
            _ => Err(err(
                self.text,
                col,
                "expected a comparison (= != < <= > >=), \"is blank\", \"in (...)\" or \"matches\"",
            )),
        }
    }
}

impl Predicate {
    /// Parses `text` against the columns of `header`.
    pub fn parse(text: &str, header: &[String]) -> Result<Predicate> {
        let toks = lex(text)?;
        if toks.is_empty() {
            return Err(err(
                text,
                1,
                "the predicate is empty; e.g. status = 'cancelled'",
            ));
        }
        let mut p = Parser {
            toks,
            at: 0,
            text,
            n_chars: text.chars().count(),
            depth: 0,
            header,
        };
        let root = p.expr()?;
        if let Some(l) = p.peek() {
            return Err(err(
                text,
                l.col,
                "unexpected text after a complete predicate (join tests with \"and\" or \"or\")",
            ));
        }
        Ok(Predicate {
            root,
            text: text.to_string(),
        })
    }

    pub fn text(&self) -> &str {
        &self.text
    }

    /// Whether the predicate holds for a row; `is_blank` says which values count as blank.
    pub fn holds(&self, r: &RawRecord<'_>, is_blank: &dyn Fn(&[u8]) -> bool) -> bool {
        eval(&self.root, r, is_blank)
    }
}

fn get<'a>(v: &'a Value, r: &'a RawRecord<'_>, is_blank: &dyn Fn(&[u8]) -> bool) -> &'a [u8] {
    match v {
        Value::Column(i) => {
            let f = r.field(*i);
            if is_blank(f) {
                b""
            } else {
                f
            }
        }
        Value::Literal(s) => s.as_bytes(),
    }
}

fn compare(a: &[u8], b: &[u8]) -> Ordering {
    if number_shape(a).is_some() && number_shape(b).is_some() {
        cmp_numbers(a, b)
    } else {
        a.cmp(b)
    }
}

fn eval(n: &Node, r: &RawRecord<'_>, is_blank: &dyn Fn(&[u8]) -> bool) -> bool {
    match n {
        Node::Or(items) => items.iter().any(|a| eval(a, r, is_blank)),
        Node::And(items) => items.iter().all(|a| eval(a, r, is_blank)),
        Node::Not(a) => !eval(a, r, is_blank),
        Node::Blank(v) => get(v, r, is_blank).is_empty(),
        Node::In(v, items) => {
            let x = get(v, r, is_blank);
            items
                .iter()
                .any(|i| compare(x, get(i, r, is_blank)) == Ordering::Equal)
        }
        Node::Matches(v, re) => {
            std::str::from_utf8(get(v, r, is_blank)).is_ok_and(|s| re.is_match(s))
        }
        Node::Cmp(a, op, b) => {
            let o = compare(get(a, r, is_blank), get(b, r, is_blank));
            match *op {
                "=" => o == Ordering::Equal,
                "!=" => o != Ordering::Equal,
                "<" => o == Ordering::Less,
                "<=" => o != Ordering::Greater,
                ">" => o == Ordering::Greater,
                _ => o != Ordering::Less,
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::table::parse::parse_all;

    fn header() -> Vec<String> {
        ["status", "amount", "shop name", "email"]
            .iter()
            .map(|s| s.to_string())
            .collect()
    }

    fn check(pred: &str, row: &str) -> bool {
        let p = Predicate::parse(pred, &header()).unwrap();
        let recs = parse_all(row.as_bytes(), b',').unwrap();
        let fields: Vec<u8> = recs[0].concat();
        let mut ends = Vec::new();
        let mut e = 0;
        for f in &recs[0] {
            e += f.len();
            ends.push(e);
        }
        let r = RawRecord {
            fields: &fields,
            ends: &ends,
            byte: 0,
            line: 1,
            index: 0,
        };
        p.holds(&r, &|v: &[u8]| v.is_empty() || v == b"NA")
    }

    #[test]
    fn comparisons_are_numeric_when_both_sides_are_numbers() {
        assert!(check("amount > 9", "done,10.5,Quillby,a@example.org"));
        // A quoted literal that is a plain number still compares as a number.
        assert!(check("amount > '9'", "done,10.5,Quillby,a@example.org"));
        assert!(check("amount = 10.50", "done,10.5,Quillby,a@example.org"));
        // Text comparison when a side is not a number.
        assert!(check("status < 'open'", "done,x,Quillby,a@example.org"));
    }

    #[test]
    fn blanks_lists_regexes_and_logic() {
        let row = "cancelled,NA,Oxwater Wheelworks,";
        assert!(check("amount is blank and email is blank", row));
        assert!(check("status in ('cancelled', 'test')", row));
        assert!(check("not status not in ('cancelled')", row));
        assert!(check("`shop name` matches '^Ox'", row));
        assert!(check(
            "(status = 'done' or status = 'cancelled') and not amount is not blank",
            row
        ));
        // Keywords are case-blind; column names are not.
        assert!(check("status = 'cancelled' OR amount > 1", row));
        assert!(Predicate::parse("STATUS = 'x'", &header()).is_err());
    }

    #[test]
    fn deep_nesting_is_refused_with_its_column_and_long_chains_stay_flat() {
        let h = header();
        let ok = format!(
            "{}status = 'x'{}",
            "(".repeat(MAX_NESTING),
            ")".repeat(MAX_NESTING)
        );
        assert!(Predicate::parse(&ok, &h).is_ok());
        for deep in [
            format!("{}status = 'x'{}", "(".repeat(10_300), ")".repeat(10_300)),
            format!("{}status = 'x'", "not ".repeat(40_000)),
        ] {
            let e = Predicate::parse(&deep, &h).unwrap_err().to_string();
            assert!(e.contains("nest more than 200 deep"), "{e}");
            assert!(
                e.len() < 400,
                "the refusal shows only part of the text: {e}"
            );
        }
        let e = Predicate::parse(&format!("{}status = 'x'", "not ".repeat(201)), &h)
            .unwrap_err()
            .to_string();
        // The 201st `not` starts at character 801.
        assert!(e.contains("column 801:"), "{e}");
        // 40,000 alternatives: one flat list, evaluated without deep recursion.
        let wide = vec!["status = 'nope'"; 40_000].join(" or ") + " or status = 'cancelled'";
        assert!(check(&wide, "cancelled,1,Quillby,"));
        assert!(!check(&wide, "open,1,Quillby,"));
        let long_and = vec!["amount > 0"; 40_000].join(" and ");
        assert!(check(&long_and, "open,1,Quillby,"));
    }

    #[test]
    fn errors_point_at_the_column() {
        let h = header();
        let e = Predicate::parse("status = ", &h).unwrap_err().to_string();
        assert!(e.contains("column 10"), "{e}");
        let e = Predicate::parse("statsu = 'x'", &h)
            .unwrap_err()
            .to_string();
        assert!(e.contains("column 1: no column \"statsu\""), "{e}");
        let e = Predicate::parse("status = 'open", &h)
            .unwrap_err()
            .to_string();
        assert!(e.contains("column 10: this text is never closed"), "{e}");
        let e = Predicate::parse("status = 'a' amount", &h)
            .unwrap_err()
            .to_string();
        assert!(e.contains("column 14"), "{e}");
        let e = Predicate::parse("email matches '('", &h)
            .unwrap_err()
            .to_string();
        assert!(
            e.contains("column 15: not a valid regular expression"),
            "{e}"
        );
    }
}
