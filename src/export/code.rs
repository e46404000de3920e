//! Generated code for the C and Rust exports: a tiny imperative form (float buffers, loops,
//! loads of weight arrays at their precision), written once per program step in
//! [`emit_step`] and printed as C99 or as Rust by [`Lang`]. The two exports differ only in
//! how this form is printed and in their file wrappers.

use super::precision::{Quant, Quantized};
use crate::kernel::{Kernel, Nu};
use crate::program::{Program, Step, ValueId};
use crate::{Error, Result};
use std::fmt::Write;

/// An expression.
#[derive(Debug, Clone)]
pub(crate) enum E {
    /// Float literal.
    F(f64),
    /// Index literal.
    Ix(usize),
    /// A variable (float or index).
    V(String),
    /// Element of a float buffer (or of the input `x`).
    Buf(String, Box<E>),
    /// Element of a weight array, as f32 whatever its storage.
    W(String, Box<E>),
    /// Element of an int32 array, used as an index.
    IxLd(String, Box<E>),
    /// Float arithmetic: `+ - * /`.
    Bin(char, Box<E>, Box<E>),
    /// Index arithmetic: `+ *`.
    IBin(char, Box<E>, Box<E>),
    /// `cos sin exp sqrt abs tanh acos` (one argument), `pow max` (two).
    Call(&'static str, Vec<E>),
    /// 1.0 where the argument is > 0, else 0.0.
    Pos(Box<E>),
}

fn b(e: E) -> Box<E> {
    Box::new(e)
}
fn add(a: E, c: E) -> E {
    E::Bin('+', b(a), b(c))
}
fn sub(a: E, c: E) -> E {
    E::Bin('-', b(a), b(c))
}
fn mul(a: E, c: E) -> E {
    E::Bin('*', b(a), b(c))
}
fn div(a: E, c: E) -> E {
    E::Bin('/', b(a), b(c))
}
fn iadd(a: E, c: E) -> E {
    E::IBin('+', b(a), b(c))
}
fn imul(a: E, c: E) -> E {
    E::IBin('*', b(a), b(c))
}
fn v(s: &str) -> E {
    E::V(s.into())
}
fn buf(name: &str, i: E) -> E {
    E::Buf(name.into(), b(i))
}
fn w(name: &str, i: E) -> E {
    E::W(name.into(), b(i))
}
fn call(f: &'static str, a: Vec<E>) -> E {
    E::Call(f, a)
}

/// A statement.
#[derive(Debug, Clone)]
pub(crate) enum S {
    /// A zeroed float buffer of a length.
    Buf(String, usize),
    /// An immutable float variable.
    Let(String, E),
    /// A mutable float variable.
    LetMut(String, E),
    /// `var = e`.
    Set(String, E),
    /// `buf[i] = e`.
    Store(String, E, E),
    /// `for var in lo..hi`.
    For(String, E, E, Vec<S>),
    /// `for var in (lo..hi).step_by(step)`.
    ForStep(String, E, E, usize, Vec<S>),
    /// A comment.
    Note(String),
}

fn for_(var: &str, lo: E, hi: E, body: Vec<S>) -> S {
    S::For(var.into(), lo, hi, body)
}

/// A weight array to declare.
#[derive(Debug, Clone)]
pub(crate) struct Array {
    pub name: String,
    pub data: ArrayData,
}

/// What a weight array holds.
#[derive(Debug, Clone)]
pub(crate) enum ArrayData {
    F32(Vec<f32>),
    F16(Vec<u16>),
    /// int8 values with their scales; `cols` and `axis` say which scale an element uses.
    I8 {
        q: Vec<i8>,
        scale: Vec<f32>,
        cols: usize,
        axis: usize,
    },
    Signs(Vec<i8>),
    Index(Vec<i32>),
}

/// The target language.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum Lang {
    C,
    Rust,
}

/// Everything a generated scorer needs: arrays, buffers and statements.
#[derive(Debug, Default)]
pub(crate) struct Code {
    pub arrays: Vec<Array>,
    pub body: Vec<S>,
    pub lines: Vec<String>,
    count: usize,
}

impl Code {
    fn fresh(&mut self, hint: &str) -> String {
        self.count += 1;
        format!("{hint}{}", self.count)
    }

    /// Declares a weight array from the export tensor `tensor`, named `name`.
    fn array(&mut self, q: &Quantized, tensor: &str, name: &str) -> String {
        let (shape, qv) = q.get(tensor);
        let cols = if shape.len() == 2 { shape[1] } else { 1 };
        let data = match qv {
            Quant::F32(x) => ArrayData::F32(x.clone()),
            Quant::F16(x) => ArrayData::F16(x.clone()),
            Quant::I8 { q, scale, axis } => ArrayData::I8 {
                q: q.clone(),
                scale: scale.clone(),
                cols,
                axis: *axis,
            },
            Quant::Signs(x) => ArrayData::Signs(x.clone()),
            Quant::Index(x) => ArrayData::Index(x.clone()),
        };
        self.arrays.push(Array {
            name: name.to_string(),
            data,
        });
        name.to_string()
    }

    fn f32_array(&mut self, name: &str, v: Vec<f32>) -> String {
        self.arrays.push(Array {
            name: name.to_string(),
            data: ArrayData::F32(v),
        });
        name.to_string()
    }
}

/// A Sylvester-ordered blockwise Walsh–Hadamard transform, in place on `o` of length `n`.
fn wht(o: &str, n: usize, block: usize) -> Vec<S> {
    let mut body = Vec::new();
    let mut h = 1;
    while h < block {
        // for blk in (0..n).step_by(2h) { for j in blk..blk+h { a = o[j]; c = o[j+h]; ... } }
        body.push(S::ForStep(
            "i".into(),
            E::Ix(0),
            E::Ix(n),
            2 * h,
            vec![for_(
                "j",
                v("i"),
                iadd(v("i"), E::Ix(h)),
                vec![
                    S::Let("a".into(), buf(o, v("j"))),
                    S::Let("c".into(), buf(o, iadd(v("j"), E::Ix(h)))),
                    S::Store(o.into(), v("j"), add(v("a"), v("c"))),
                    S::Store(o.into(), iadd(v("j"), E::Ix(h)), sub(v("a"), v("c"))),
                ],
            )],
        ));
        h *= 2;
    }
    body
}

/// Kernel `k` of the row `x` (width `n`) against landmark `l` (array `lm`): statements that
/// leave the value in the returned variable.
fn kernel(code: &mut Code, k: &Kernel, x: &str, lm: &str, n: usize, out: &mut Vec<S>) -> E {
    let row = |j: E| iadd(imul(v("l"), E::Ix(n)), j);
    match k {
        Kernel::Sum(parts) | Kernel::Product(parts) => {
            let op = if matches!(k, Kernel::Sum(_)) {
                '+'
            } else {
                '*'
            };
            let mut acc = kernel(code, &parts[0], x, lm, n, out);
            for p in &parts[1..] {
                let e = kernel(code, p, x, lm, n, out);
                acc = E::Bin(op, b(acc), b(e));
            }
            acc
        }
        Kernel::Scaled(c, inner) => mul(E::F(*c), kernel(code, inner, x, lm, n, out)),
        k if k.is_shift_invariant() => {
            let s: Vec<f32> = k
                .inverse_scale(n)
                .expect("shift-invariant")
                .iter()
                .map(|v| *v as f32)
                .collect();
            let sname = code.fresh("KS");
            code.f32_array(&sname, s);
            let acc = code.fresh("r");
            let t = code.fresh("t");
            let diff = mul(sub(buf(x, v("j")), w(lm, row(v("j")))), w(&sname, v("j")));
            let l1 = matches!(k, Kernel::Laplacian { .. });
            out.push(S::LetMut(acc.clone(), E::F(0.0)));
            out.push(for_(
                "j",
                E::Ix(0),
                E::Ix(n),
                vec![
                    S::Let(t.clone(), diff),
                    S::Set(
                        acc.clone(),
                        add(
                            v(&acc),
                            if l1 {
                                call("abs", vec![v(&t)])
                            } else {
                                mul(v(&t), v(&t))
                            },
                        ),
                    ),
                ],
            ));
            let r2 = v(&acc);
            match k {
                Kernel::Laplacian { .. } => call("exp", vec![mul(E::F(-1.0), r2)]),
                Kernel::Gaussian { .. } => call("exp", vec![mul(E::F(-0.5), r2)]),
                Kernel::Matern { nu, .. } => {
                    let r = call("sqrt", vec![r2.clone()]);
                    let (c, poly): (f64, Box<dyn Fn(E) -> E>) = match nu {
                        Nu::Half => (1.0, Box::new(|_| E::F(1.0))),
                        Nu::ThreeHalves => (3f64.sqrt(), Box::new(|a| add(E::F(1.0), a))),
                        Nu::FiveHalves => {
                            let r2c = r2.clone();
                            (
                                5f64.sqrt(),
                                Box::new(move |a| {
                                    add(add(E::F(1.0), a), mul(E::F(5.0 / 3.0), r2c.clone()))
                                }),
                            )
                        }
                    };
                    let a = mul(E::F(c), r);
                    mul(poly(a.clone()), call("exp", vec![mul(E::F(-1.0), a)]))
                }
                Kernel::RationalQuadratic { alpha, .. } => call(
                    "pow",
                    vec![
                        add(E::F(1.0), mul(E::F(1.0 / (2.0 * alpha)), r2)),
                        E::F(-alpha),
                    ],
                ),
                _ => unreachable!("shift-invariant kernels"),
            }
        }
        _ => {
            let dot = code.fresh("d");
            let (nx, nl) = (code.fresh("nx"), code.fresh("nl"));
            let arccos = matches!(k, Kernel::ArcCos { .. });
            out.push(S::LetMut(dot.clone(), E::F(0.0)));
            let mut body = vec![S::Set(
                dot.clone(),
                add(v(&dot), mul(buf(x, v("j")), w(lm, row(v("j"))))),
            )];
            if arccos {
                out.push(S::LetMut(nx.clone(), E::F(0.0)));
                out.push(S::LetMut(nl.clone(), E::F(0.0)));
                body.push(S::Set(
                    nx.clone(),
                    add(v(&nx), mul(buf(x, v("j")), buf(x, v("j")))),
                ));
                body.push(S::Set(
                    nl.clone(),
                    add(v(&nl), mul(w(lm, row(v("j"))), w(lm, row(v("j"))))),
                ));
            }
            out.push(for_("j", E::Ix(0), E::Ix(n), body));
            let d = v(&dot);
            match k {
                Kernel::Linear => d,
                Kernel::Polynomial {
                    degree,
                    gamma,
                    coef0,
                } => call(
                    "pow",
                    vec![
                        add(mul(E::F(*gamma), d), E::F(*coef0)),
                        E::F(*degree as f64),
                    ],
                ),
                Kernel::Sigmoid { gamma, coef0 } => {
                    call("tanh", vec![add(mul(E::F(*gamma), d), E::F(*coef0))])
                }
                Kernel::ArcCos { order } => {
                    let nn = mul(call("sqrt", vec![v(&nx)]), call("sqrt", vec![v(&nl)]));
                    let th_name = code.fresh("th");
                    let nn_name = code.fresh("nn");
                    out.push(S::Let(nn_name.clone(), nn));
                    let cs = div(d, call("max", vec![v(&nn_name), E::F(1e-30)]));
                    let cl = call("max", vec![call("min1", vec![cs]), E::F(-1.0)]);
                    out.push(S::Let(th_name.clone(), call("acos", vec![cl])));
                    let pi = E::F(std::f64::consts::PI);
                    let pmt = sub(pi.clone(), v(&th_name));
                    if *order == 0 {
                        div(pmt, pi)
                    } else {
                        div(
                            mul(
                                v(&nn_name),
                                add(
                                    call("sin", vec![v(&th_name)]),
                                    mul(pmt, call("cos", vec![v(&th_name)])),
                                ),
                            ),
                            pi,
                        )
                    }
                }
                _ => unreachable!("dot-product kernels"),
            }
        }
    }
}

/// The statements of step `i` from input buffers `ins` into buffer `o`; the line says how
/// it was lowered.
fn emit_step(
    code: &mut Code,
    q: &Quantized,
    i: usize,
    step: &Step,
    ins: &[(String, usize)],
    o: &str,
    od: usize,
) -> Result<Vec<S>> {
    let t = |f: &str| format!("step{i}.{f}");
    let nm = |f: &str| format!("S{i}_{}", f.to_uppercase());
    let (u, n) = (ins[0].0.as_str(), ins[0].1);
    let copy = |from: &str, off: usize, len: usize| {
        for_(
            "j",
            E::Ix(0),
            E::Ix(len),
            vec![S::Store(
                o.into(),
                iadd(v("j"), E::Ix(off)),
                buf(from, v("j")),
            )],
        )
    };
    let map = |f: &dyn Fn(E) -> E| {
        vec![for_(
            "j",
            E::Ix(0),
            E::Ix(n),
            vec![S::Store(o.into(), v("j"), f(buf(u, v("j"))))],
        )]
    };
    Ok(match step {
        Step::Scale(_) => {
            let a = code.array(q, &t("factors"), &nm("factors"));
            map(&|x| mul(x, w(&a, v("j"))))
        }
        Step::ConstScale(c) => map(&|x| mul(x, E::F(c.value()))),
        Step::Pad(_) => vec![copy(u, 0, n)],
        Step::Tile(tl) => (0..tl.copies()).map(|c| copy(u, c * n, n)).collect(),
        Step::Signs(_) => {
            let a = code.array(q, &t("signs"), &nm("signs"));
            map(&|x| mul(x, w(&a, v("j"))))
        }
        Step::Wht(wh) => {
            let mut s = vec![copy(u, 0, n)];
            s.extend(wht(o, n, wh.block()));
            s
        }
        Step::Gather(_) => {
            let a = code.array(q, &t("indices"), &nm("indices"));
            vec![for_(
                "j",
                E::Ix(0),
                E::Ix(od),
                vec![S::Store(
                    o.into(),
                    v("j"),
                    buf(u, E::IxLd(a.clone(), b(v("j")))),
                )],
            )]
        }
        Step::Dense(_) => {
            let a = code.array(q, &t("weights"), &nm("weights"));
            vec![for_(
                "r",
                E::Ix(0),
                E::Ix(od),
                vec![
                    S::LetMut("acc".into(), E::F(0.0)),
                    for_(
                        "j",
                        E::Ix(0),
                        E::Ix(n),
                        vec![S::Set(
                            "acc".into(),
                            add(
                                v("acc"),
                                mul(w(&a, iadd(imul(v("r"), E::Ix(n)), v("j"))), buf(u, v("j"))),
                            ),
                        )],
                    ),
                    S::Store(o.into(), v("r"), v("acc")),
                ],
            )]
        }
        Step::CosSin(cs) => {
            let c = cs.scale();
            vec![for_(
                "j",
                E::Ix(0),
                E::Ix(n),
                vec![
                    S::Store(o.into(), v("j"), mul(E::F(c), call("cos", vec![buf(u, v("j"))]))),
                    S::Store(
                        o.into(),
                        iadd(v("j"), E::Ix(n)),
                        mul(E::F(c), call("sin", vec![buf(u, v("j"))])),
                    ),
                ],
            )]
        }
        Step::CosPhase(cp) => {
            let a = code.array(q, &t("phases"), &nm("phases"));
            let c = cp.scale();
            map(&|x| mul(E::F(c), call("cos", vec![add(x, w(&a, v("j")))])))
        }
        Step::KernelBlock(kb) => {
            let a = code.array(q, &t("landmarks"), &nm("landmarks"));
            let mut inner = Vec::new();
            let val = kernel(code, kb.kernel(), u, &a, n, &mut inner);
            inner.push(S::Store(o.into(), v("l"), val));
            vec![for_("l", E::Ix(0), E::Ix(od), inner)]
        }
        Step::Relu(_) => map(&|x| call("max", vec![x, E::F(0.0)])),
        Step::Heaviside(_) => map(&|x| E::Pos(b(x))),
        Step::Concat(_) => {
            let mut off = 0;
            let mut s = Vec::new();
            for (name, len) in ins {
                s.push(copy(name, off, *len));
                off += len;
            }
            s
        }
        Step::Product(_) => {
            let mut e = E::F(1.0);
            for (name, len) in ins {
                let at = if *len == 1 { E::Ix(0) } else { v("j") };
                e = mul(e, buf(name, at));
            }
            vec![for_("j", E::Ix(0), E::Ix(od), vec![S::Store(o.into(), v("j"), e)])]
        }
        Step::Append(a) => vec![copy(u, 0, n), S::Store(o.into(), E::Ix(n), E::F(a.value()))],
        Step::SegmentProduct(sp) => {
            let mut s = Vec::new();
            let mut at = 0usize;
            for (k, l) in sp.lengths().iter().enumerate() {
                let mut e = E::F(1.0);
                for j in 0..*l as usize {
                    e = mul(e, buf(u, E::Ix(at + j)));
                }
                at += *l as usize;
                s.push(S::Store(o.into(), E::Ix(k), e));
            }
            s
        }
        Step::CountSketchFft(_) => {
            return Err(Error::input(format!(
                "step {i} (count_sketch_fft, a Tensor Sketch) has no C or Rust lowering; export tensorsketch models to onnx, or compile polynomial kernels with maclaurin or nystrom"
            )))
        }
    })
}

/// Statements computing the decision values into `out` from the input `x`.
pub(crate) fn scorer(model: &crate::model::CompiledModel, q: &Quantized) -> Result<Code> {
    let mut code = Code::default();
    let p: &Program = model.program();
    let d = model.input_dim();
    let mut body = vec![S::Buf("v0".into(), d)];
    let input = if model.scaling().is_some() {
        let m = code.array(q, "input.mean", "INPUT_MEAN");
        let s = code.array(q, "input.scale", "INPUT_SCALE");
        div(sub(buf("x", v("j")), w(&m, v("j"))), w(&s, v("j")))
    } else {
        buf("x", v("j"))
    };
    body.push(for_(
        "j",
        E::Ix(0),
        E::Ix(d),
        vec![S::Store("v0".into(), v("j"), input)],
    ));
    for (i, ins) in p.instrs().iter().enumerate() {
        let o = format!("v{}", i + 1);
        let od = p.dim(ValueId(i + 1));
        let bufs: Vec<(String, usize)> = ins
            .inputs
            .iter()
            .map(|x| (format!("v{}", x.0), p.dim(*x)))
            .collect();
        body.push(S::Note(format!(
            "step {i}: {} ({})",
            ins.step.name(),
            ins.step.describe()
        )));
        body.push(S::Buf(o.clone(), od));
        let s = emit_step(&mut code, q, i, &ins.step, &bufs, &o, od)?;
        body.extend(s);
        code.lines
            .push(format!("step {i} {}: loops", ins.step.name()));
    }
    let z = format!("v{}", p.output().0);
    let h = code.array(q, "head.weights", "HEAD_WEIGHTS");
    let bias = code.array(q, "head.bias", "HEAD_BIAS");
    let k = model.n_outputs();
    let dd = p.output_dim();
    body.push(S::Note("linear head".into()));
    body.push(for_(
        "c",
        E::Ix(0),
        E::Ix(k),
        vec![
            S::LetMut("acc".into(), w(&bias, v("c"))),
            for_(
                "j",
                E::Ix(0),
                E::Ix(dd),
                vec![S::Set(
                    "acc".into(),
                    add(
                        v("acc"),
                        mul(buf(&z, v("j")), w(&h, iadd(imul(v("j"), E::Ix(k)), v("c")))),
                    ),
                )],
            ),
            S::Store("out".into(), v("c"), v("acc")),
        ],
    ));
    code.body = body;
    Ok(code)
}

fn lit(x: f64, lang: Lang) -> String {
    let f = x as f32;
    let s = if f.is_finite() {
        format!("{f:?}")
    } else {
        "0.0".into()
    };
    let s = match lang {
        Lang::C => format!("{s}f"),
        Lang::Rust => format!("{s}_f32"),
    };
    if f < 0.0 || s.starts_with('-') {
        format!("({s})")
    } else {
        s
    }
}

/// Prints an expression.
pub(crate) fn expr(e: &E, lang: Lang, arrays: &[Array]) -> String {
    let p = |e: &E| expr(e, lang, arrays);
    match e {
        E::F(x) => lit(*x, lang),
        E::Ix(i) => i.to_string(),
        E::V(s) => s.clone(),
        E::Buf(name, i) => format!("{name}[{}]", p(i)),
        E::IxLd(name, i) => match lang {
            Lang::C => format!("{name}[{}]", p(i)),
            Lang::Rust => format!("({name}[{}] as usize)", p(i)),
        },
        E::W(name, i) => {
            let a = arrays
                .iter()
                .find(|a| &a.name == name)
                .expect("array declared");
            let ix = p(i);
            match (&a.data, lang) {
                (ArrayData::F32(_), _) => format!("{name}[{ix}]"),
                (ArrayData::F16(_), Lang::C) => format!("kp_h2f({name}[{ix}])"),
                (ArrayData::F16(_), Lang::Rust) => format!("h2f({name}[{ix}])"),
                (ArrayData::Signs(_), Lang::C) | (ArrayData::Index(_), Lang::C) => {
                    format!("((float){name}[{ix}])")
                }
                (ArrayData::Signs(_), Lang::Rust) | (ArrayData::Index(_), Lang::Rust) => {
                    format!("({name}[{ix}] as f32)")
                }
                (ArrayData::I8 { cols, axis, .. }, _) => {
                    let s = if *axis == 0 {
                        format!("({ix}) / {cols}")
                    } else {
                        format!("({ix}) % {cols}")
                    };
                    match lang {
                        Lang::C => format!("((float){name}[{ix}] * {name}_SCALE[{s}])"),
                        Lang::Rust => format!("({name}[{ix}] as f32 * {name}_SCALE[{s}])"),
                    }
                }
            }
        }
        E::Bin(op, a, c) => format!("({} {op} {})", p(a), p(c)),
        E::IBin(op, a, c) => format!("({} {op} {})", p(a), p(c)),
        E::Pos(a) => match lang {
            Lang::C => format!("({} > 0.0f ? 1.0f : 0.0f)", p(a)),
            Lang::Rust => format!("(if {} > 0.0 {{ 1.0_f32 }} else {{ 0.0_f32 }})", p(a)),
        },
        E::Call(f, args) => {
            let a: Vec<String> = args.iter().map(p).collect();
            match lang {
                Lang::C => {
                    let name = match *f {
                        "abs" => "fabsf",
                        "max" => "fmaxf",
                        "min1" => return format!("fminf({}, 1.0f)", a[0]),
                        "cos" => "cosf",
                        "sin" => "sinf",
                        "exp" => "expf",
                        "sqrt" => "sqrtf",
                        "tanh" => "tanhf",
                        "acos" => "acosf",
                        "pow" => "powf",
                        other => other,
                    };
                    format!("{name}({})", a.join(", "))
                }
                Lang::Rust => match *f {
                    "max" => format!("{}.max({})", a[0], a[1]),
                    "min1" => format!("{}.min(1.0_f32)", a[0]),
                    "pow" => format!("{}.powf({})", a[0], a[1]),
                    other => format!("{}.{other}()", a[0]),
                },
            }
        }
    }
}

/// Prints statements with `indent` levels.
pub(crate) fn stmts(ss: &[S], lang: Lang, arrays: &[Array], indent: usize, out: &mut String) {
    let pad = "    ".repeat(indent);
    for s in ss {
        let _ = match s {
            S::Note(t) => writeln!(out, "{pad}/* {t} */"),
            S::Buf(name, n) => match lang {
                Lang::C => writeln!(out, "{pad}float {name}[{n}] = {{0}};"),
                Lang::Rust => writeln!(out, "{pad}let mut {name} = [0.0_f32; {n}];"),
            },
            S::Let(name, e) => match lang {
                Lang::C => writeln!(out, "{pad}const float {name} = {};", expr(e, lang, arrays)),
                Lang::Rust => writeln!(out, "{pad}let {name}: f32 = {};", expr(e, lang, arrays)),
            },
            S::LetMut(name, e) => match lang {
                Lang::C => writeln!(out, "{pad}float {name} = {};", expr(e, lang, arrays)),
                Lang::Rust => {
                    writeln!(out, "{pad}let mut {name}: f32 = {};", expr(e, lang, arrays))
                }
            },
            S::Set(name, e) => writeln!(out, "{pad}{name} = {};", expr(e, lang, arrays)),
            S::Store(name, i, e) => writeln!(
                out,
                "{pad}{name}[{}] = {};",
                expr(i, lang, arrays),
                expr(e, lang, arrays)
            ),
            S::For(var, lo, hi, body) | S::ForStep(var, lo, hi, _, body) => {
                let step = if let S::ForStep(_, _, _, st, _) = s {
                    *st
                } else {
                    1
                };
                let (l, h) = (expr(lo, lang, arrays), expr(hi, lang, arrays));
                let _ = match (lang, step) {
                    (Lang::C, 1) => {
                        writeln!(out, "{pad}for (int {var} = {l}; {var} < {h}; {var}++) {{")
                    }
                    (Lang::C, st) => {
                        writeln!(
                            out,
                            "{pad}for (int {var} = {l}; {var} < {h}; {var} += {st}) {{"
                        )
                    }
                    (Lang::Rust, 1) => writeln!(out, "{pad}for {var} in {l}..{h} {{"),
                    (Lang::Rust, st) => {
                        writeln!(out, "{pad}for {var} in ({l}..{h}).step_by({st}) {{")
                    }
                };
                stmts(body, lang, arrays, indent + 1, out);
                writeln!(out, "{pad}}}")
            }
        };
    }
}

fn join_lit<T: std::fmt::Display>(v: &[T]) -> String {
    let mut s = String::new();
    for (i, x) in v.iter().enumerate() {
        if i > 0 {
            s.push_str(if i % 8 == 0 { ",\n    " } else { ", " });
        }
        let _ = write!(s, "{x}");
    }
    s
}

/// Declarations of the weight arrays.
pub(crate) fn declare(arrays: &[Array], lang: Lang) -> String {
    let mut out = String::new();
    for a in arrays {
        let (cty, rty, vals, n) = match &a.data {
            ArrayData::F32(v) => (
                "float",
                "f32",
                join_lit(&v.iter().map(|x| lit(*x as f64, lang)).collect::<Vec<_>>()),
                v.len(),
            ),
            ArrayData::F16(v) => ("unsigned short", "u16", join_lit(v), v.len()),
            ArrayData::I8 { q, scale, .. } => {
                let sv: Vec<String> = scale.iter().map(|x| lit(*x as f64, lang)).collect();
                let _ = match lang {
                    Lang::C => writeln!(
                        out,
                        "static const float {}_SCALE[{}] = {{\n    {}\n}};",
                        a.name,
                        scale.len(),
                        join_lit(&sv)
                    ),
                    Lang::Rust => writeln!(
                        out,
                        "static {}_SCALE: [f32; {}] = [\n    {}\n];",
                        a.name,
                        scale.len(),
                        join_lit(&sv)
                    ),
                };
                ("signed char", "i8", join_lit(q), q.len())
            }
            ArrayData::Signs(v) => ("signed char", "i8", join_lit(v), v.len()),
            ArrayData::Index(v) => ("int", "i32", join_lit(v), v.len()),
        };
        let _ = match lang {
            Lang::C => writeln!(
                out,
                "static const {cty} {}[{n}] = {{\n    {vals}\n}};",
                a.name
            ),
            Lang::Rust => writeln!(out, "static {}: [{rty}; {n}] = [\n    {vals}\n];", a.name),
        };
    }
    out
}

/// True when any array is stored as binary16 (the file then needs the conversion helper).
pub(crate) fn uses_f16(arrays: &[Array]) -> bool {
    arrays.iter().any(|a| matches!(a.data, ArrayData::F16(_)))
}

/// The exact fallback of a guarded export: the support vectors ordered by the outputs
/// their coefficients feed (those feeding none dropped), in groups of one pattern, so that
/// a subset of outputs reads only the groups that feed it.
pub(crate) struct ExactPart {
    /// Statements computing the kernel value of support vector `l` against the scaled
    /// row in buffer `v0`, then the value.
    pub kernel: Vec<S>,
    pub value: E,
    /// Number of groups (`EXACT_GROUP_START` has one more entry).
    pub groups: usize,
    /// Statements filling the scaled row `v0` from `x`.
    pub scale: Vec<S>,
}

/// Declares the exact model's arrays (`EXACT_SV`, `EXACT_COEF` `[n × k]`, `EXACT_BIAS`,
/// `EXACT_GROUP_START`, `EXACT_GROUP_OUTPUTS` `[groups × k]`, 1 where the group feeds the
/// output) in f32 whatever the export precision, and returns its statements. The scaling
/// arrays are those [`scorer`] declared (a guard's two stages share their scaling).
pub(crate) fn exact_part(code: &mut Code, exact: &crate::model::ExactModel) -> ExactPart {
    let sv = exact.support_vectors();
    let coef = exact.coef();
    let (n, k) = coef.dim();
    let d = sv.ncols();
    let pattern = |i: usize| -> Vec<bool> { coef.row(i).iter().map(|c| *c != 0.0).collect() };
    let mut order: Vec<usize> = (0..n)
        .filter(|&i| coef.row(i).iter().any(|c| *c != 0.0))
        .collect();
    order.sort_by_key(|&i| std::cmp::Reverse(pattern(i)));
    let mut starts = vec![0i32];
    let mut group_out: Vec<i8> = Vec::new();
    let mut last: Option<Vec<bool>> = None;
    for (r, &i) in order.iter().enumerate() {
        let p = pattern(i);
        if last.as_ref() != Some(&p) {
            if last.is_some() {
                starts.push(r as i32);
            }
            group_out.extend(p.iter().map(|&b| i8::from(b)));
            last = Some(p);
        }
    }
    starts.push(order.len() as i32);
    if order.is_empty() {
        starts = vec![0, 0];
        group_out = vec![0; k];
    }
    let groups = starts.len() - 1;
    let svs: Vec<f32> = order
        .iter()
        .flat_map(|&i| sv.row(i).iter().map(|v| *v as f32).collect::<Vec<_>>())
        .collect();
    let cs: Vec<f32> = order
        .iter()
        .flat_map(|&i| coef.row(i).iter().map(|v| *v as f32).collect::<Vec<_>>())
        .collect();
    code.f32_array("EXACT_SV", svs);
    code.f32_array("EXACT_COEF", cs);
    code.f32_array(
        "EXACT_BIAS",
        exact.intercept().iter().map(|v| *v as f32).collect(),
    );
    code.arrays.push(Array {
        name: "EXACT_GROUP_START".into(),
        data: ArrayData::Index(starts),
    });
    code.arrays.push(Array {
        name: "EXACT_GROUP_OUTPUTS".into(),
        data: ArrayData::Signs(group_out),
    });
    let mut kernel_stmts = Vec::new();
    let value = kernel(code, exact.kernel(), "v0", "EXACT_SV", d, &mut kernel_stmts);
    let input = if exact.scaling().is_some() {
        assert!(
            code.arrays.iter().any(|a| a.name == "INPUT_MEAN"),
            "the compiled stage declares the scaling"
        );
        div(
            sub(buf("x", v("j")), w("INPUT_MEAN", v("j"))),
            w("INPUT_SCALE", v("j")),
        )
    } else {
        buf("x", v("j"))
    };
    let scale = vec![
        S::Buf("v0".into(), d),
        for_(
            "j",
            E::Ix(0),
            E::Ix(d),
            vec![S::Store("v0".into(), v("j"), input)],
        ),
    ];
    ExactPart {
        kernel: kernel_stmts,
        value,
        groups,
        scale,
    }
}

/// A threshold literal (infinities allowed).
pub(crate) fn threshold_lit(t: f64, lang: Lang) -> String {
    match (t.is_finite(), t > 0.0, lang) {
        (true, _, _) => lit(t, lang),
        (false, true, Lang::C) => "HUGE_VALF".into(),
        (false, false, Lang::C) => "(-HUGE_VALF)".into(),
        (false, true, Lang::Rust) => "f32::INFINITY".into(),
        (false, false, Lang::Rust) => "f32::NEG_INFINITY".into(),
    }
}
