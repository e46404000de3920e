//! Parser and printer for kernel expressions.
//!
//! Grammar (whitespace is free):
//! ```text
//! expr   := term ('+' term)*
//! term   := factor ('*' factor)*          numbers in a term scale it: 2.5 * k
//! factor := NUMBER | call | '(' expr ')'
//! call   := NAME '(' [param (',' param)*] ')'
//! param  := NAME '=' (NUMBER | '[' NUMBER (',' NUMBER)* ']')
//! ```

use super::{Kernel, Nu, Width};
use crate::{Error, Result};
use std::fmt;

#[derive(Debug, Clone, PartialEq)]
enum Tok {
    Num(f64),
    Name(String),
    LParen,
    RParen,
    LBracket,
    RBracket,
    Comma,
    Eq,
    Plus,
    Star,
}

fn lex(s: &str) -> Result<Vec<(Tok, usize)>> {
    let b = s.as_bytes();
    let mut out = Vec::new();
    let mut i = 0;
    while i < b.len() {
        let c = b[i] as char;
        let start = i;
        match c {
            ' ' | '\t' | '\n' | '\r' => {
                i += 1;
                continue;
            }
            '(' => out.push((Tok::LParen, i)),
            ')' => out.push((Tok::RParen, i)),
            '[' => out.push((Tok::LBracket, i)),
            ']' => out.push((Tok::RBracket, i)),
            ',' => out.push((Tok::Comma, i)),
            '=' => out.push((Tok::Eq, i)),
            '+' => out.push((Tok::Plus, i)),
            '*' => out.push((Tok::Star, i)),
            c if c.is_ascii_digit() || c == '.' || c == '-' => {
                i += 1;
                while i < b.len() {
                    let d = b[i] as char;
                    let exp_sign = (d == '-' || d == '+') && matches!(b[i - 1], b'e' | b'E');
                    if d.is_ascii_alphanumeric() || d == '.' || exp_sign {
                        i += 1;
                    } else {
                        break;
                    }
                }
                let text = &s[start..i];
                if text == "-" {
                    return Err(Error::input(format!(
                        "kernel expression: '-' at position {}: subtraction is not supported (a difference of kernels need not be a kernel); combine kernels with + (sum), * (product) and positive scale factors",
                        start + 1
                    )));
                }
                let v: f64 = text.parse().map_err(|_| {
                    Error::input(format!(
                        "kernel expression: '{text}' at position {} is not a number",
                        start + 1
                    ))
                })?;
                out.push((Tok::Num(v), start));
                continue;
            }
            c if c.is_ascii_alphabetic() || c == '_' => {
                i += 1;
                while i < b.len() && ((b[i] as char).is_ascii_alphanumeric() || b[i] == b'_') {
                    i += 1;
                }
                let name = s[start..i].to_ascii_lowercase();
                match name.as_str() {
                    "nan" => out.push((Tok::Num(f64::NAN), start)),
                    "inf" | "infinity" => out.push((Tok::Num(f64::INFINITY), start)),
                    _ => out.push((Tok::Name(name), start)),
                }
                continue;
            }
            _ => {
                let ch = s[i..].chars().next().unwrap_or('?');
                return Err(Error::input(format!(
                    "kernel expression: unexpected character '{ch}' at position {}",
                    s[..i].chars().count() + 1
                )));
            }
        }
        i += 1;
    }
    Ok(out)
}

struct Parser {
    toks: Vec<(Tok, usize)>,
    pos: usize,
    len: usize,
    depth: usize,
    kernels: usize,
}

/// Deepest nesting of parentheses accepted (deeper input is refused, never recursed into).
pub const MAX_DEPTH: usize = 32;
/// Most kernels (named leaves) in one expression.
pub const MAX_KERNELS: usize = 64;
/// Longest expression text, in bytes.
pub const MAX_LEN: usize = 1 << 16;

#[derive(Debug, Clone)]
enum Value {
    Num(f64),
    List(Vec<f64>),
}

enum Factor {
    Num(f64),
    Kernel(Kernel),
}

impl Parser {
    fn peek(&self) -> Option<&Tok> {
        self.toks.get(self.pos).map(|t| &t.0)
    }
    fn at(&self) -> usize {
        self.toks
            .get(self.pos)
            .map(|t| t.1 + 1)
            .unwrap_or(self.len + 1)
    }
    fn err(&self, what: &str) -> Error {
        let found = match self.peek() {
            None => "the end".to_string(),
            Some(t) => short(&format!("{t:?}")),
        };
        Error::input(format!(
            "kernel expression: expected {what} at position {}, found {found}",
            self.at()
        ))
    }
    fn eat(&mut self, t: &Tok) -> bool {
        if self.peek() == Some(t) {
            self.pos += 1;
            true
        } else {
            false
        }
    }
    fn expect(&mut self, t: Tok, what: &str) -> Result<()> {
        if self.eat(&t) {
            Ok(())
        } else {
            Err(self.err(what))
        }
    }

    fn expr(&mut self) -> Result<Kernel> {
        let mut terms = vec![self.term()?];
        while self.eat(&Tok::Plus) {
            terms.push(self.term()?);
        }
        Kernel::sum(terms)
    }

    fn term(&mut self) -> Result<Kernel> {
        let start = self.at();
        let mut coef: Option<f64> = None;
        let mut ks = Vec::new();
        loop {
            match self.factor()? {
                Factor::Num(v) => {
                    if !(v > 0.0 && v.is_finite()) {
                        return Err(Error::input(format!(
                            "kernel expression: scale factor {v} near position {start} must be a positive finite number"
                        )));
                    }
                    coef = Some(coef.unwrap_or(1.0) * v);
                }
                Factor::Kernel(k) => ks.push(k),
            }
            if !self.eat(&Tok::Star) {
                break;
            }
        }
        if ks.is_empty() {
            return Err(Error::input(format!(
                "kernel expression: a number alone is not a kernel (near position {start}); write for example 2 * linear()"
            )));
        }
        let k = Kernel::product(ks)?;
        Ok(match coef {
            Some(c) => Kernel::Scaled(c, Box::new(k)),
            None => k,
        })
    }

    fn factor(&mut self) -> Result<Factor> {
        match self.peek().cloned() {
            Some(Tok::Num(v)) => {
                self.pos += 1;
                Ok(Factor::Num(v))
            }
            Some(Tok::LParen) => {
                if self.depth >= MAX_DEPTH {
                    return Err(Error::input(format!(
                        "kernel expression: parentheses nested deeper than {MAX_DEPTH} at position {}",
                        self.at()
                    )));
                }
                self.pos += 1;
                self.depth += 1;
                let k = self.expr()?;
                self.depth -= 1;
                self.expect(Tok::RParen, "')'")?;
                Ok(Factor::Kernel(k))
            }
            Some(Tok::Name(name)) => {
                let at = self.at();
                self.kernels += 1;
                if self.kernels > MAX_KERNELS {
                    return Err(Error::input(format!(
                        "kernel expression: more than {MAX_KERNELS} kernels (position {at}); combine fewer terms"
                    )));
                }
                self.pos += 1;
                self.expect(Tok::LParen, &format!("'(' after '{}'", short(&name)))?;
                let mut params: Vec<(String, Value, usize)> = Vec::new();
                if !self.eat(&Tok::RParen) {
                    loop {
                        let pat = self.at();
                        let key = match self.peek().cloned() {
                            Some(Tok::Name(k)) => {
                                self.pos += 1;
                                k
                            }
                            _ => return Err(self.err("a parameter name")),
                        };
                        self.expect(Tok::Eq, &format!("'=' after '{}'", short(&key)))?;
                        let v = self.value()?;
                        if params.iter().any(|p| p.0 == key) {
                            return Err(Error::input(format!(
                                "kernel {name}: parameter '{key}' given twice (position {pat})"
                            )));
                        }
                        params.push((key, v, pat));
                        if self.eat(&Tok::RParen) {
                            break;
                        }
                        self.expect(Tok::Comma, "',' or ')'")?;
                    }
                }
                build(&name, params, at).map(Factor::Kernel)
            }
            _ => Err(self.err("a kernel name, a number or '('")),
        }
    }

    fn value(&mut self) -> Result<Value> {
        match self.peek().cloned() {
            Some(Tok::Num(v)) => {
                self.pos += 1;
                Ok(Value::Num(v))
            }
            Some(Tok::LBracket) => {
                self.pos += 1;
                let mut v = Vec::new();
                loop {
                    match self.peek().cloned() {
                        Some(Tok::Num(x)) => {
                            self.pos += 1;
                            v.push(x)
                        }
                        _ => return Err(self.err("a number in the list")),
                    }
                    if self.eat(&Tok::RBracket) {
                        break;
                    }
                    self.expect(Tok::Comma, "',' or ']'")?;
                }
                Ok(Value::List(v))
            }
            _ => Err(self.err("a number or a [list]")),
        }
    }
}

/// A name as error messages show it: whole up to 40 characters, else its start and its
/// length (an error stays one readable line whatever was typed).
fn short(s: &str) -> String {
    let n = s.chars().count();
    if n <= 40 {
        s.to_string()
    } else {
        format!(
            "{}… ({n} characters)",
            s.chars().take(24).collect::<String>()
        )
    }
}

/// Parses a kernel expression.
pub(crate) fn parse(s: &str) -> Result<Kernel> {
    if s.len() > MAX_LEN {
        return Err(Error::input(format!(
            "kernel expression is {} bytes long; at most {MAX_LEN} are accepted",
            s.len()
        )));
    }
    let toks = lex(s)?;
    if toks.is_empty() {
        return Err(Error::input("kernel expression is empty"));
    }
    let mut p = Parser {
        toks,
        pos: 0,
        len: s.len(),
        depth: 0,
        kernels: 0,
    };
    let k = p.expr()?;
    if p.pos != p.toks.len() {
        return Err(p.err("'+', '*' or the end of the expression"));
    }
    Ok(k)
}

const KERNELS: &str =
    "gaussian, laplacian, matern, rational_quadratic, polynomial, arccos, linear, sigmoid";

struct Params {
    kernel: String,
    at: usize,
    items: Vec<(String, Value, usize)>,
}

impl Params {
    fn take(&mut self, key: &str) -> Option<Value> {
        let i = self.items.iter().position(|p| p.0 == key)?;
        Some(self.items.remove(i).1)
    }
    fn num(&mut self, key: &str, default: Option<f64>) -> Result<f64> {
        match self.take(key) {
            Some(Value::Num(v)) => Ok(v),
            Some(Value::List(_)) => Err(Error::input(format!(
                "kernel {}: parameter '{key}' must be one number, not a list",
                self.kernel
            ))),
            None => default.ok_or_else(|| {
                let hint = self
                    .items
                    .iter()
                    .find(|(k, _, _)| closest(k, &[key]).is_some())
                    .map(|(k, _, _)| format!("; '{k}' is unknown — did you mean '{key}'?"))
                    .unwrap_or_default();
                Error::input(format!(
                    "kernel {} (position {}): parameter '{key}' is required{hint}",
                    self.kernel, self.at
                ))
            }),
        }
    }
    fn positive(&mut self, key: &str, default: Option<f64>) -> Result<f64> {
        let v = self.num(key, default)?;
        // `!(v > 0)` also rejects NaN.
        if !(v > 0.0) || !v.is_finite() {
            return Err(Error::input(format!(
                "kernel {}: {key} = {v} is invalid; expected a positive finite number",
                self.kernel
            )));
        }
        Ok(v)
    }
    /// Reads a parameter written under an older name (`old`) as `new`, so that files written
    /// before the rename still load; both at once is an error.
    fn alias(&mut self, old: &str, new: &str) -> Result<()> {
        if self.items.iter().any(|p| p.0 == old) {
            if self.items.iter().any(|p| p.0 == new) {
                return Err(Error::input(format!(
                    "kernel {}: give '{new}' once ('{old}' is its older spelling)",
                    self.kernel
                )));
            }
            for p in self.items.iter_mut().filter(|p| p.0 == old) {
                p.0 = new.to_string();
            }
        }
        Ok(())
    }
    fn finite(&mut self, key: &str, default: Option<f64>) -> Result<f64> {
        let v = self.num(key, default)?;
        if !v.is_finite() {
            return Err(Error::input(format!(
                "kernel {}: {key} = {v} is invalid; expected a finite number",
                self.kernel
            )));
        }
        Ok(v)
    }
    /// `gamma=` or `lengthscale=` (scalar or list); exactly one unless `allow_gamma` is false.
    fn width(&mut self, allow_gamma: bool, default_ls: Option<f64>) -> Result<Width> {
        let has_gamma = self.items.iter().any(|p| p.0 == "gamma");
        let has_ls = self.items.iter().any(|p| p.0 == "lengthscale");
        if has_gamma && !allow_gamma {
            return Err(Error::input(format!(
                "kernel {}: takes 'lengthscale', not 'gamma'",
                self.kernel
            )));
        }
        if has_gamma && has_ls {
            return Err(Error::input(format!(
                "kernel {}: give either 'gamma' or 'lengthscale', not both",
                self.kernel
            )));
        }
        if has_gamma {
            return Ok(Width::Gamma(self.positive("gamma", None)?));
        }
        match self.take("lengthscale") {
            Some(Value::List(v)) => {
                if v.is_empty() || v.iter().any(|l| !(*l > 0.0) || !l.is_finite()) {
                    return Err(Error::input(format!(
                        "kernel {}: every lengthscale must be a positive finite number, got {v:?}",
                        self.kernel
                    )));
                }
                Ok(Width::PerDim(v))
            }
            Some(Value::Num(l)) => {
                self.items.push(("lengthscale".into(), Value::Num(l), 0));
                Ok(Width::Lengthscale(self.positive("lengthscale", None)?))
            }
            None => match default_ls {
                Some(l) => Ok(Width::Lengthscale(l)),
                None => Err(Error::input(format!(
                    "kernel {} (position {}): needs 'gamma' or 'lengthscale'{}",
                    self.kernel,
                    self.at,
                    self.items
                        .first()
                        .and_then(|(k, _, _)| closest(k, &["gamma", "lengthscale"])
                            .map(|c| format!("; '{k}' is unknown — did you mean '{c}'?")))
                        .unwrap_or_default()
                ))),
            },
        }
    }
    fn finish(self, allowed: &str) -> Result<()> {
        if let Some((k, _, at)) = self.items.first() {
            let names: Vec<&str> = allowed
                .split([',', ' '])
                .filter(|w| !w.is_empty() && *w != "or" && *w != "and" && *w != "none")
                .collect();
            let hint = closest(k, &names)
                .map(|c| format!(" — did you mean '{c}'?"))
                .unwrap_or_default();
            return Err(Error::input(format!(
                "kernel {}: unknown parameter '{}' (position {at}); it takes {allowed}{hint}",
                self.kernel,
                short(k)
            )));
        }
        Ok(())
    }
}

/// The candidate within two edits of `name`, if any (the nearest).
pub(crate) fn closest<'a>(name: &str, candidates: &[&'a str]) -> Option<&'a str> {
    crate::error::closest(name, candidates)
}

fn build(name: &str, items: Vec<(String, Value, usize)>, at: usize) -> Result<Kernel> {
    let mut p = Params {
        kernel: name.to_string(),
        at,
        items,
    };
    let k = match name {
        "gaussian" => {
            let width = p.width(true, None)?;
            p.finish("gamma or lengthscale")?;
            Kernel::Gaussian { width }
        }
        "laplacian" => {
            let width = p.width(true, None)?;
            p.finish("gamma or lengthscale")?;
            Kernel::Laplacian { width }
        }
        "matern" => {
            let nu_v = p.num("nu", None)?;
            let nu = if nu_v == 0.5 {
                Nu::Half
            } else if nu_v == 1.5 {
                Nu::ThreeHalves
            } else if nu_v == 2.5 {
                Nu::FiveHalves
            } else {
                return Err(Error::input(format!(
                    "kernel matern: nu = {nu_v} is not supported; expected 0.5, 1.5 or 2.5"
                )));
            };
            let width = p.width(false, Some(1.0))?;
            p.finish("nu and lengthscale")?;
            Kernel::Matern { nu, width }
        }
        "rational_quadratic" => {
            let alpha = p.positive("alpha", Some(1.0))?;
            let width = p.width(false, Some(1.0))?;
            p.finish("alpha and lengthscale")?;
            Kernel::RationalQuadratic { alpha, width }
        }
        "polynomial" => {
            let dv = p.num("degree", None)?;
            if !(dv >= 1.0) || dv.fract() != 0.0 || dv > 32.0 {
                return Err(Error::input(format!(
                    "kernel polynomial: degree = {dv} is invalid; expected a whole number from 1 to 32"
                )));
            }
            let gamma = p.positive("gamma", Some(1.0))?;
            p.alias("coef0", "offset")?;
            let coef0 = p.finite("offset", Some(1.0))?;
            if coef0 < 0.0 {
                return Err(Error::input(format!(
                    "kernel polynomial: offset = {coef0} is invalid; expected offset ≥ 0 (a negative offset is not positive definite)"
                )));
            }
            p.finish("degree, gamma and offset")?;
            Kernel::Polynomial {
                degree: dv as u32,
                gamma,
                coef0,
            }
        }
        "arccos" => {
            let o = p.num("order", Some(1.0))?;
            if o != 0.0 && o != 1.0 {
                return Err(Error::input(format!(
                    "kernel arccos: order = {o} is not supported; expected 0 or 1"
                )));
            }
            p.finish("order")?;
            Kernel::ArcCos { order: o as u32 }
        }
        "linear" => {
            p.finish("no parameters")?;
            Kernel::Linear
        }
        "sigmoid" => {
            let gamma = p.positive("gamma", Some(1.0))?;
            p.alias("coef0", "offset")?;
            let coef0 = p.finite("offset", Some(0.0))?;
            p.finish("gamma and offset")?;
            Kernel::Sigmoid { gamma, coef0 }
        }
        other => {
            return Err(Error::input(format!(
            "kernel expression: unknown kernel '{}' at position {at}; known kernels: {KERNELS}{}",
            short(other),
            closest(other, &KERNELS.split(", ").collect::<Vec<_>>())
                .map(|c| format!(" — did you mean '{c}'?"))
                .unwrap_or_default()
        )))
        }
    };
    Ok(k)
}

fn fmt_width(w: &Width, f: &mut fmt::Formatter<'_>) -> fmt::Result {
    match w {
        Width::Gamma(g) => write!(f, "gamma={g:?}"),
        Width::Lengthscale(l) => write!(f, "lengthscale={l:?}"),
        Width::PerDim(v) => {
            write!(f, "lengthscale=[")?;
            for (i, l) in v.iter().enumerate() {
                if i > 0 {
                    write!(f, ", ")?;
                }
                write!(f, "{l:?}")?;
            }
            write!(f, "]")
        }
    }
}

/// Prints in the syntax `parse` reads; floats use Rust's shortest round-trip form.
pub(crate) fn print(k: &Kernel, f: &mut fmt::Formatter<'_>) -> fmt::Result {
    match k {
        Kernel::Gaussian { width } => {
            write!(f, "gaussian(")?;
            fmt_width(width, f)?;
            write!(f, ")")
        }
        Kernel::Laplacian { width } => {
            write!(f, "laplacian(")?;
            fmt_width(width, f)?;
            write!(f, ")")
        }
        Kernel::Matern { nu, width } => {
            write!(f, "matern(nu={:?}, ", nu.value())?;
            fmt_width(width, f)?;
            write!(f, ")")
        }
        Kernel::RationalQuadratic { alpha, width } => {
            write!(f, "rational_quadratic(alpha={alpha:?}, ")?;
            fmt_width(width, f)?;
            write!(f, ")")
        }
        Kernel::Polynomial {
            degree,
            gamma,
            coef0,
        } => write!(
            f,
            "polynomial(degree={degree}, gamma={gamma:?}, offset={coef0:?})"
        ),
        Kernel::ArcCos { order } => write!(f, "arccos(order={order})"),
        Kernel::Linear => write!(f, "linear()"),
        Kernel::Sigmoid { gamma, coef0 } => write!(f, "sigmoid(gamma={gamma:?}, offset={coef0:?})"),
        Kernel::Sum(v) => {
            for (i, t) in v.iter().enumerate() {
                if i > 0 {
                    write!(f, " + ")?;
                }
                if matches!(t, Kernel::Sum(_)) {
                    write!(f, "(")?;
                    print(t, f)?;
                    write!(f, ")")?;
                } else {
                    print(t, f)?;
                }
            }
            Ok(())
        }
        Kernel::Product(v) => {
            for (i, t) in v.iter().enumerate() {
                if i > 0 {
                    write!(f, " * ")?;
                }
                if matches!(t, Kernel::Sum(_) | Kernel::Scaled(..) | Kernel::Product(_)) {
                    write!(f, "(")?;
                    print(t, f)?;
                    write!(f, ")")?;
                } else {
                    print(t, f)?;
                }
            }
            Ok(())
        }
        Kernel::Scaled(c, inner) => {
            write!(f, "{c:?} * ")?;
            if matches!(**inner, Kernel::Sum(_) | Kernel::Scaled(..)) {
                write!(f, "(")?;
                print(inner, f)?;
                write!(f, ")")
            } else {
                print(inner, f)
            }
        }
    }
}
