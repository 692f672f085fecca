//! Values written as expressions over named parameters: `"1 - drop"`, `"(1 - drop) / 2"`,
//! `"drop^2"`. Parsed by precedence climbing and evaluated exactly, together with the gradient
//! with respect to every parameter (forward-mode differentiation over rationals).

use num_bigint::BigInt;
use num_rational::BigRational;
use num_traits::{One, Zero};

use super::value::parse_exact;

/// Longest expression accepted, in characters.
pub const MAX_EXPRESSION_CHARS: usize = 2_000;

/// Largest magnitude of an integer power.
pub const MAX_POWER: i64 = 1_000;

/// Largest size of an intermediate numerator or denominator, in bits; refuses `(2^1000)^1000`
/// before it exhausts memory.
pub const MAX_BITS: u64 = 200_000;

/// A parsed expression; parameters are indices into the chain's parameter list.
#[derive(Clone, Debug, PartialEq)]
pub enum Expr {
    /// A number.
    Number(BigRational),
    /// A parameter.
    Parameter(usize),
    /// `-a`.
    Negate(Box<Expr>),
    /// `a + b`, `a - b`, `a * b`, `a / b` (the operator, then the operands).
    Binary(char, Box<Expr>, Box<Expr>),
    /// `a ^ k` for an integer `k`.
    Power(Box<Expr>, i64),
}

/// A value and its gradient with respect to each parameter.
#[derive(Clone, Debug, PartialEq)]
pub struct Dual {
    /// The value.
    pub value: BigRational,
    /// `d value / d parameter`, one entry per parameter.
    pub gradient: Vec<BigRational>,
}

impl Dual {
    /// A constant (zero gradient) over `parameters` parameters.
    #[must_use]
    pub fn constant(value: BigRational, parameters: usize) -> Self {
        Dual {
            value,
            gradient: vec![BigRational::zero(); parameters],
        }
    }
}

impl Dual {
    /// Adds another dual in place.
    pub fn add_assign(&mut self, other: &Dual) {
        self.value = super::value::add(&self.value, &other.value);
        for (g, h) in self.gradient.iter_mut().zip(&other.gradient) {
            *g += h;
        }
    }

    /// `self * other` with the product rule.
    #[must_use]
    pub fn mul(&self, other: &Dual) -> Dual {
        Dual {
            value: &self.value * &other.value,
            gradient: self
                .gradient
                .iter()
                .zip(&other.gradient)
                .map(|(g, h)| g * &other.value + &self.value * h)
                .collect(),
        }
    }

    /// `self / total` with the quotient rule; `total` must not be zero.
    #[must_use]
    pub fn ratio(&self, total: &Dual) -> Dual {
        let square = &total.value * &total.value;
        Dual {
            value: super::value::divide(&self.value, &total.value),
            gradient: self
                .gradient
                .iter()
                .zip(&total.gradient)
                .map(|(g, h)| (g * &total.value - &self.value * h) / &square)
                .collect(),
        }
    }
}

/// Where parsing or evaluation failed: a 1-based character column and what is wrong.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct ExprError {
    /// 1-based column in the expression text (0 when the whole expression is at fault).
    pub column: usize,
    /// What is wrong.
    pub message: String,
}

impl std::fmt::Display for ExprError {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        if self.column == 0 {
            write!(f, "{}", self.message)
        } else {
            write!(f, "column {}: {}", self.column, self.message)
        }
    }
}

fn error<T>(column: usize, message: impl Into<String>) -> Result<T, ExprError> {
    Err(ExprError {
        column,
        message: message.into(),
    })
}

#[derive(Clone, Debug, PartialEq)]
enum Token {
    Number(BigRational),
    Name(String),
    Symbol(char),
}

/// Splits the text into tokens with their 1-based columns.
fn tokens(text: &str) -> Result<Vec<(Token, usize)>, ExprError> {
    let chars: Vec<char> = text.chars().collect();
    let mut out = Vec::new();
    let mut i = 0;
    while i < chars.len() {
        let c = chars[i];
        let column = i + 1;
        if c.is_whitespace() {
            i += 1;
        } else if c.is_ascii_digit() || c == '.' {
            let start = i;
            while i < chars.len() && (chars[i].is_ascii_digit() || chars[i] == '.') {
                i += 1;
            }
            // An exponent only when digits follow (so `2e` stays an error, not a name).
            if i < chars.len() && (chars[i] == 'e' || chars[i] == 'E') {
                let mut j = i + 1;
                if j < chars.len() && (chars[j] == '+' || chars[j] == '-') {
                    j += 1;
                }
                if j < chars.len() && chars[j].is_ascii_digit() {
                    i = j;
                    while i < chars.len() && chars[i].is_ascii_digit() {
                        i += 1;
                    }
                }
            }
            let mut literal: String = chars[start..i].iter().collect();
            if i < chars.len() && chars[i] == '%' {
                literal.push('%');
                i += 1;
            }
            match parse_exact(&literal) {
                Ok(v) => out.push((Token::Number(v), column)),
                Err(message) => return error(column, message),
            }
        } else if c.is_alphabetic() || c == '_' {
            let start = i;
            while i < chars.len() && (chars[i].is_alphanumeric() || chars[i] == '_') {
                i += 1;
            }
            out.push((Token::Name(chars[start..i].iter().collect()), column));
        } else if "+-*/^()".contains(c) {
            out.push((Token::Symbol(c), column));
            i += 1;
        } else {
            return error(column, format!("unexpected character '{c}'"));
        }
    }
    Ok(out)
}

struct Parser<'a> {
    tokens: Vec<(Token, usize)>,
    at: usize,
    end_column: usize,
    parameters: &'a [String],
}

impl Parser<'_> {
    fn peek(&self) -> Option<&Token> {
        self.tokens.get(self.at).map(|(t, _)| t)
    }

    fn column(&self) -> usize {
        self.tokens
            .get(self.at)
            .map_or(self.end_column, |(_, c)| *c)
    }

    /// expression := term (('+' | '-') term)*
    fn expression(&mut self) -> Result<Expr, ExprError> {
        let mut left = self.term()?;
        while let Some(Token::Symbol(op @ ('+' | '-'))) = self.peek() {
            let op = *op;
            self.at += 1;
            let right = self.term()?;
            left = Expr::Binary(op, Box::new(left), Box::new(right));
        }
        Ok(left)
    }

    /// term := unary (('*' | '/') unary)*
    fn term(&mut self) -> Result<Expr, ExprError> {
        let mut left = self.unary()?;
        while let Some(Token::Symbol(op @ ('*' | '/'))) = self.peek() {
            let op = *op;
            self.at += 1;
            let right = self.unary()?;
            left = Expr::Binary(op, Box::new(left), Box::new(right));
        }
        Ok(left)
    }

    /// unary := ('-' | '+') unary | power
    fn unary(&mut self) -> Result<Expr, ExprError> {
        match self.peek() {
            Some(Token::Symbol('-')) => {
                self.at += 1;
                Ok(Expr::Negate(Box::new(self.unary()?)))
            }
            Some(Token::Symbol('+')) => {
                self.at += 1;
                self.unary()
            }
            _ => self.power(),
        }
    }

    /// power := atom ('^' ['-'] integer)?
    fn power(&mut self) -> Result<Expr, ExprError> {
        let base = self.atom()?;
        if let Some(Token::Symbol('^')) = self.peek() {
            self.at += 1;
            let negative = matches!(self.peek(), Some(Token::Symbol('-')));
            if negative {
                self.at += 1;
            }
            let column = self.column();
            let exponent = match self.peek() {
                Some(Token::Number(n)) if n.is_integer() => n.to_integer(),
                _ => return error(column, "a power must be a whole number, such as ^2 or ^-1"),
            };
            self.at += 1;
            let exponent: i64 = match i64::try_from(&exponent) {
                Ok(k) if k <= MAX_POWER => {
                    if negative {
                        -k
                    } else {
                        k
                    }
                }
                _ => return error(column, format!("a power may be at most {MAX_POWER}")),
            };
            return Ok(Expr::Power(Box::new(base), exponent));
        }
        Ok(base)
    }

    /// atom := number | name | '(' expression ')'
    fn atom(&mut self) -> Result<Expr, ExprError> {
        let column = self.column();
        let Some((token, _)) = self.tokens.get(self.at).cloned() else {
            return error(column, "the expression ends where a value is expected");
        };
        self.at += 1;
        match token {
            Token::Number(n) => Ok(Expr::Number(n)),
            Token::Name(name) => match self.parameters.iter().position(|p| *p == name) {
                Some(index) => Ok(Expr::Parameter(index)),
                None if self.parameters.is_empty() => error(
                    column,
                    format!("unknown name '{name}': the chain declares no `parameters`"),
                ),
                None => error(
                    column,
                    format!(
                        "unknown name '{name}'; the parameters are {}",
                        self.parameters.join(", ")
                    ),
                ),
            },
            Token::Symbol('(') => {
                let inner = self.expression()?;
                match self.peek() {
                    Some(Token::Symbol(')')) => {
                        self.at += 1;
                        Ok(inner)
                    }
                    _ => error(self.column(), "missing ')'"),
                }
            }
            Token::Symbol(c) => error(
                column,
                format!("unexpected '{c}' where a value is expected"),
            ),
        }
    }
}

/// Parses an expression whose names must be among `parameters`.
///
/// # Errors
/// Syntax errors and unknown names, with the column where they occur.
pub fn parse(text: &str, parameters: &[String]) -> Result<Expr, ExprError> {
    if text.chars().count() > MAX_EXPRESSION_CHARS {
        return error(
            0,
            format!("expression is longer than {MAX_EXPRESSION_CHARS} characters"),
        );
    }
    let tokens = tokens(text)?;
    if tokens.is_empty() {
        return error(
            0,
            "expected a number or an expression, found an empty string",
        );
    }
    let end_column = text.chars().count() + 1;
    let mut parser = Parser {
        tokens,
        at: 0,
        end_column,
        parameters,
    };
    let expr = parser.expression()?;
    if parser.at < parser.tokens.len() {
        return error(parser.column(), "unexpected text after the expression");
    }
    Ok(expr)
}

fn too_big(value: &BigRational) -> bool {
    value.numer().bits() > MAX_BITS || value.denom().bits() > MAX_BITS
}

impl Expr {
    /// Evaluates the expression and its gradient at the given parameter values.
    ///
    /// # Errors
    /// Division by zero, a negative power of zero, or numbers too large to carry on with.
    pub fn evaluate(&self, values: &[BigRational]) -> Result<Dual, ExprError> {
        let n = values.len();
        let result = match self {
            Expr::Number(v) => Dual::constant(v.clone(), n),
            Expr::Parameter(i) => {
                let mut d = Dual::constant(values[*i].clone(), n);
                d.gradient[*i] = BigRational::one();
                d
            }
            Expr::Negate(a) => {
                let a = a.evaluate(values)?;
                Dual {
                    value: -a.value,
                    gradient: a.gradient.into_iter().map(|g| -g).collect(),
                }
            }
            Expr::Binary(op, a, b) => {
                let (a, b) = (a.evaluate(values)?, b.evaluate(values)?);
                let pairs = a.gradient.iter().zip(&b.gradient);
                match op {
                    '+' => Dual {
                        value: &a.value + &b.value,
                        gradient: pairs.map(|(x, y)| x + y).collect(),
                    },
                    '-' => Dual {
                        value: &a.value - &b.value,
                        gradient: pairs.map(|(x, y)| x - y).collect(),
                    },
                    '*' => Dual {
                        value: &a.value * &b.value,
                        gradient: pairs.map(|(x, y)| x * &b.value + &a.value * y).collect(),
                    },
                    _ => {
                        if b.value.is_zero() {
                            return error(0, "division by zero at these parameter values");
                        }
                        let square = &b.value * &b.value;
                        Dual {
                            value: &a.value / &b.value,
                            gradient: pairs
                                .map(|(x, y)| (x * &b.value - &a.value * y) / &square)
                                .collect(),
                        }
                    }
                }
            }
            Expr::Power(a, k) => {
                let a = a.evaluate(values)?;
                if a.value.is_zero() && *k < 0 {
                    return error(0, "a negative power of zero at these parameter values");
                }
                if *k == 0 {
                    Dual::constant(BigRational::one(), n)
                } else {
                    // Refuse before computing: the power has about |k| times the base's bits.
                    let bits = a.value.numer().bits().max(a.value.denom().bits());
                    if bits.saturating_mul(k.unsigned_abs()) > MAX_BITS {
                        return error(0, "a power produces a number too large to carry on with");
                    }
                    // d(a^k) = k a^(k-1) da
                    let below = pow(&a.value, k - 1);
                    if too_big(&below) {
                        return error(0, "a power produces a number too large to carry on with");
                    }
                    let factor = BigRational::from_integer(BigInt::from(*k)) * &below;
                    Dual {
                        value: &below * &a.value,
                        gradient: a.gradient.iter().map(|g| g * &factor).collect(),
                    }
                }
            }
        };
        if too_big(&result.value) {
            return error(
                0,
                "the expression produces a number too large to carry on with",
            );
        }
        Ok(result)
    }
}

fn pow(base: &BigRational, exponent: i64) -> BigRational {
    let positive = num_traits::pow(base.clone(), exponent.unsigned_abs() as usize);
    if exponent < 0 {
        positive.recip()
    } else {
        positive
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn r(n: i64, d: i64) -> BigRational {
        BigRational::new(n.into(), d.into())
    }

    fn eval(text: &str, values: &[(&str, BigRational)]) -> Result<Dual, ExprError> {
        let names: Vec<String> = values.iter().map(|(n, _)| n.to_string()).collect();
        let values: Vec<BigRational> = values.iter().map(|(_, v)| v.clone()).collect();
        parse(text, &names)?.evaluate(&values)
    }

    #[test]
    fn evaluates_with_precedence_and_exact_gradients() {
        let d = eval("(1 - drop) / 2", &[("drop", r(1, 40))]).unwrap();
        assert_eq!(d.value, r(39, 80));
        assert_eq!(d.gradient, [r(-1, 2)]);
        let d = eval(
            "drop^2 + 3 * drop * pity - 1/6",
            &[("drop", r(1, 2)), ("pity", r(2, 1))],
        )
        .unwrap();
        assert_eq!(d.value, r(1, 4) + r(3, 1) - r(1, 6));
        assert_eq!(d.gradient, [r(1, 1) + r(6, 1), r(3, 2)]);
        let d = eval("-x^2", &[("x", r(3, 1))]).unwrap();
        assert_eq!(d.value, r(-9, 1));
        let d = eval("1 / x + x^-2", &[("x", r(2, 1))]).unwrap();
        assert_eq!(d.value, r(3, 4));
        assert_eq!(d.gradient, [r(-1, 4) + r(-2, 8)]);
        assert_eq!(
            eval("0.6% * 2.5e-3", &[]).unwrap().value,
            r(3, 500) * r(1, 400)
        );
        assert_eq!(eval("2 - 3 - 4", &[]).unwrap().value, r(-5, 1));
        assert_eq!(eval("12 / 3 / 2", &[]).unwrap().value, r(2, 1));
    }

    #[test]
    fn reports_the_column_of_each_mistake() {
        let names = vec!["drop".to_string()];
        let column = |text: &str| parse(text, &names).unwrap_err().column;
        assert_eq!(column("1 - dorp"), 5);
        assert_eq!(column("(1 - drop"), 10);
        assert_eq!(column("1 - * drop"), 5);
        assert_eq!(column("drop ^ 1.5"), 8);
        assert_eq!(column("drop $ 2"), 6);
        assert_eq!(column("drop drop"), 6);
        assert_eq!(column("2^2000"), 3);
        assert!(parse("1 - dorp", &names)
            .unwrap_err()
            .message
            .contains("drop"));
    }

    #[test]
    fn refuses_division_by_zero_and_runaway_sizes() {
        assert!(eval("1 / (x - 1)", &[("x", r(1, 1))])
            .unwrap_err()
            .message
            .contains("division by zero"));
        assert!(eval("((2^1000)^1000)^1000", &[])
            .unwrap_err()
            .message
            .contains("too large"));
        assert!(eval("0^-1", &[]).is_err());
    }
}
