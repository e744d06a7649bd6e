//! Running a row loop: the column program over blocks of rows, the lanes of partial sums, and
//! the reverse pass of each column instruction.
//! Must not: change the program (that is built in `rows`).

use super::*;

pub(super) fn passes(g: Guard, x: f64) -> bool {
    match g {
        Guard::Finite => x.is_finite(),
        Guard::NonZero => x.is_finite() && x != 0.0,
        Guard::Normal => x.is_normal(),
    }
}

/// Row sums are kept in this many partial sums, row `r` going to lane `r mod LANES`: enough
/// independent additions to keep the processor busy, in an order fixed on every platform.
pub(super) const LANES: usize = 16;

pub(super) type Lanes = [f64; LANES];

/// The lanes added as a tree: lane i and lane i + 8, then i and i + 4, i and i + 2, 0 and 1.
#[inline]
pub(super) fn lane_total(l: &Lanes) -> f64 {
    let w: [f64; 8] = std::array::from_fn(|i| l[i] + l[i + 8]);
    let w: [f64; 4] = std::array::from_fn(|i| w[i] + w[i + 4]);
    (w[0] + w[2]) + (w[1] + w[3])
}

impl RowLoop {
    /// The sum's value given the outer slots computed so far; in gradient mode its gradient
    /// with respect to the inputs is left in the scratch ([`LoopScratch::grads`]).
    pub(in crate::formula::tape) fn run(
        &self,
        s: &mut LoopScratch,
        outer: &[f64],
        grad: bool,
    ) -> f64 {
        for (v, &slot) in s.inv.iter_mut().zip(&self.inputs) {
            *v = outer.get(slot as usize).copied().unwrap_or(f64::NAN);
        }
        s.grads.fill(0.0);
        if let Some(f) = &self.factored {
            let total = if grad {
                self.run_factored::<true>(f, s)
            } else {
                self.run_factored::<false>(f, s)
            };
            if let Some(t) = total {
                // Where a gradient of the factored form is not finite, the body as written
                // gives the gradient (the value stays the one `value` computes).
                if grad && !s.grads.iter().all(|g| g.is_finite()) {
                    s.grads.fill(0.0);
                    s.seeds[0] = 1.0;
                    self.run_prog::<true>(&self.exact, s);
                }
                return t;
            }
            s.grads.fill(0.0);
        }
        s.seeds[0] = 1.0;
        if grad {
            self.run_prog::<true>(&self.exact, s);
        } else {
            self.run_prog::<false>(&self.exact, s);
        }
        s.sums[0]
    }

    /// Runs the combination forward on the invariants and the root sums in `s.sums`.
    fn combine_forward(f: &Factored, s: &mut LoopScratch) {
        let c = &f.combine;
        let first = c.first_input;
        let (n_inv, n_roots) = (s.inv.len(), f.prog.roots.len());
        s.comb_vals[first..first + n_inv].copy_from_slice(&s.inv);
        s.comb_vals[first + n_inv..first + n_inv + n_roots].copy_from_slice(&s.sums[..n_roots]);
        // In gradient mode (for the auxiliary values `combine_reverse` reads): it is small.
        forward::<true>(c, &mut s.comb_vals, &mut s.comb_aux, |_, _| f64::NAN);
    }

    /// Whether the factored form may stand for the body as written: every pulled-out factor
    /// passes its guard, the total is finite, and its terms do not cancel (the total is at
    /// least 1/64 of the sum of their magnitudes; the body as written adds row by row).
    fn combine_ok(f: &Factored, s: &LoopScratch, check_total: bool) -> bool {
        let v = &s.comb_vals;
        if !f
            .guards
            .iter()
            .all(|&(slot, g)| passes(g, v[slot as usize]))
        {
            return false;
        }
        if !check_total {
            return true;
        }
        let total = v[f.combine.root as usize];
        let magnitude: f64 = f.terms.iter().map(|&t| v[t as usize].abs()).sum();
        total.is_finite() && total.abs() * CANCELLATION >= magnitude
    }

    /// Runs the combination backward: the root sums' weights go to `s.seeds`, the gradient
    /// with respect to the invariants is added to `s.grads`.
    fn combine_reverse(f: &Factored, s: &mut LoopScratch, invariants: bool) {
        let c = &f.combine;
        let first = c.first_input;
        let (n_inv, n_roots) = (s.inv.len(), f.prog.roots.len());
        // The adjoints are zero between uses (see `Evaluator::value_grad`).
        s.comb_adj[c.root as usize] = 1.0;
        reverse(c, &s.comb_vals, &s.comb_aux, &mut s.comb_adj, |_| {
            (&[][..], &[][..])
        });
        s.seeds[..n_roots].copy_from_slice(&s.comb_adj[first + n_inv..first + n_inv + n_roots]);
        if invariants {
            for (g, &a) in s.grads.iter_mut().zip(&s.comb_adj[first..first + n_inv]) {
                *g += a;
            }
        }
        c.clear_leaves(&mut s.comb_adj);
    }

    /// The factored form's value, or `None` where it may differ from the body as written.
    fn run_factored<const GRAD: bool>(&self, f: &Factored, s: &mut LoopScratch) -> Option<f64> {
        let p = &f.prog;
        if self.rows <= self.block {
            // One block: its values are still there after the combination has run.
            begin(p, s);
            self.block_forward::<GRAD>(p, s, 0);
            finish_sums(p, s);
            Self::combine_forward(f, s);
            if !Self::combine_ok(f, s, true) {
                return None;
            }
            if GRAD {
                Self::combine_reverse(f, s, true);
                self.block_reverse(p, s, 0);
                finish_grads(p, s);
            }
            return Some(s.comb_vals[f.combine.root as usize]);
        }
        // Several blocks: the factors do not depend on the root sums, so the guards and the
        // roots' weights are found first, with the sums set to zero.
        s.sums[..p.roots.len()].fill(0.0);
        Self::combine_forward(f, s);
        if !Self::combine_ok(f, s, false) {
            return None;
        }
        if GRAD {
            Self::combine_reverse(f, s, false);
        }
        self.run_prog::<GRAD>(p, s);
        Self::combine_forward(f, s);
        if !Self::combine_ok(f, s, true) {
            return None;
        }
        if GRAD {
            Self::combine_reverse(f, s, true);
        }
        Some(s.comb_vals[f.combine.root as usize])
    }

    /// Runs a column program over every row: the roots' sums go to `s.sums`; in gradient mode
    /// the roots' adjoints are `s.seeds` and the invariants' gradients are added to `s.grads`.
    fn run_prog<const GRAD: bool>(&self, p: &ColProg, s: &mut LoopScratch) {
        begin(p, s);
        let mut start = 0;
        while start < self.rows {
            self.block_forward::<GRAD>(p, s, start);
            if GRAD {
                self.block_reverse(p, s, start);
            }
            start += self.block;
        }
        finish_sums(p, s);
        if GRAD {
            finish_grads(p, s);
        }
    }

    fn block<'a>(&'a self, s: &'a [f64], start: usize) -> Block<'a> {
        Block {
            inv: s,
            data: &self.data,
            rows: self.rows,
            start,
            len: self.block.min(self.rows - start),
            b: self.block,
        }
    }

    /// The instructions forward over the block starting at row `start`; the roots' values are
    /// added to their lanes.
    fn block_forward<const GRAD: bool>(&self, p: &ColProg, s: &mut LoopScratch, start: usize) {
        let b = self.block;
        let blk = self.block(&s.inv, start);
        let len = blk.len;
        for (k, ins) in p.code.iter().enumerate() {
            let (done, rest) = s.vals.split_at_mut(k * b);
            let out = &mut rest[..len];
            let aux = match p.aux[k] {
                NONE => &mut [][..],
                x => &mut s.aux[x as usize * b..x as usize * b + len],
            };
            col_forward::<GRAD>(ins.op, blk.src(ins.a, done), blk.src(ins.b, done), out, aux);
        }
        for (t, &r) in p.roots.iter().enumerate() {
            let col = &s.vals[r as usize * b..r as usize * b + len];
            add_lanes(&mut s.root_lanes[t], col);
        }
    }

    /// The instructions backward over the block starting at row `start` (whose values
    /// `block_forward` left), from the roots' adjoints `s.seeds`.
    fn block_reverse(&self, p: &ColProg, s: &mut LoopScratch, start: usize) {
        let b = self.block;
        let blk = self.block(&s.inv, start);
        let len = blk.len;
        for &j in &p.unwritten {
            s.adj[j as usize * b..j as usize * b + len].fill(0.0);
        }
        for (t, &r) in p.roots.iter().enumerate() {
            if p.seed_only[r as usize] != NONE {
                continue;
            }
            let col = &mut s.adj[r as usize * b..r as usize * b + len];
            let w = s.seeds[t];
            if p.seed_store[t] {
                col.fill(w);
            } else {
                col.iter_mut().for_each(|x| *x += w);
            }
        }
        let vals = &s.vals[..];
        for k in (0..p.code.len()).rev() {
            let ins = p.code[k];
            let (lo, hi) = s.adj.split_at_mut(k * b);
            let g = match p.seed_only[k] {
                NONE => Src::Col(&hi[..len]),
                t => Src::Val(s.seeds[t as usize]),
            };
            let v = &vals[k * b..k * b + len];
            let aux = match p.aux[k] {
                NONE => &[][..],
                x => &s.aux[x as usize * b..x as usize * b + len],
            };
            let (a, bb) = (blk.src(ins.a, vals), blk.src(ins.b, vals));
            for (w, d) in p.dest[k].into_iter().enumerate() {
                let sink = match d {
                    Dest::Skip => continue,
                    Dest::Store(j) => Sink::Store(&mut lo[j as usize * b..j as usize * b + len]),
                    Dest::Add(j) => Sink::Add(&mut lo[j as usize * b..j as usize * b + len]),
                    Dest::Lanes(l) => Sink::Lanes(&mut s.lanes[l as usize]),
                    Dest::SumLanes(l) => {
                        let lanes = &mut s.lanes[l as usize];
                        match g {
                            Src::Col(g) => add_lanes(lanes, g),
                            Src::Val(w) => {
                                let t = &mut s.tmp[..len];
                                t.fill(w);
                                add_lanes(lanes, t);
                            }
                        }
                        continue;
                    }
                };
                col_partial(ins.op, w, g, a, bb, v, aux, sink, &mut s.tmp);
            }
        }
    }
}

/// Clears a program's lanes before its first block.
pub(super) fn begin(p: &ColProg, s: &mut LoopScratch) {
    for l in s.lanes[..p.lane_inv.len()].iter_mut() {
        *l = [0.0; LANES];
    }
    for l in s.root_lanes[..p.roots.len()].iter_mut() {
        *l = [0.0; LANES];
    }
}

/// The roots' sums from their lanes, into `s.sums`.
pub(super) fn finish_sums(p: &ColProg, s: &mut LoopScratch) {
    for (t, l) in s.root_lanes[..p.roots.len()].iter().enumerate() {
        s.sums[t] = lane_total(l);
    }
}

/// The invariants' gradients from their lanes, added to `s.grads`.
pub(super) fn finish_grads(p: &ColProg, s: &mut LoopScratch) {
    for ((l, &i), &sign) in s.lanes.iter().zip(&p.lane_inv).zip(&p.lane_sign) {
        s.grads[i as usize] += sign * lane_total(l);
    }
}

/// Where a block's operands are.
pub(super) struct Block<'a> {
    pub(super) inv: &'a [f64],
    pub(super) data: &'a [f64],
    pub(super) rows: usize,
    pub(super) start: usize,
    pub(super) len: usize,
    /// Rows per block: the stride of the computed columns.
    pub(super) b: usize,
}

impl<'a> Block<'a> {
    /// An operand over the block; `cols` holds the computed columns.
    #[inline(always)]
    fn src<'c>(&self, arg: Arg, cols: &'c [f64]) -> Src<'c>
    where
        'a: 'c,
    {
        match arg {
            Arg::Const(c) => Src::Val(c),
            Arg::Inv(j) => Src::Val(self.inv[j as usize]),
            Arg::Data(j) => {
                let at = j as usize * self.rows + self.start;
                Src::Col(&self.data[at..at + self.len])
            }
            Arg::Col(j) => {
                let at = j as usize * self.b;
                Src::Col(&cols[at..at + self.len])
            }
        }
    }
}

/// An operand over the rows of a block: a column, or one value for every row.
#[derive(Clone, Copy)]
pub(super) enum Src<'a> {
    Col(&'a [f64]),
    Val(f64),
}

impl Src<'_> {
    #[inline(always)]
    fn at(self, r: usize) -> f64 {
        match self {
            Src::Col(c) => c[r],
            Src::Val(v) => v,
        }
    }
}

/// Where one operand's share of the adjoint goes.
pub(super) enum Sink<'a> {
    /// The operand's adjoint column, written for the first time.
    Store(&'a mut [f64]),
    /// The operand's adjoint column, added to.
    Add(&'a mut [f64]),
    /// An invariant's gradient, added up by row lanes.
    Lanes(&'a mut Lanes),
}

/// Sends `f(r)` for each row `r` of the block to the sink; `tmp` is scratch of the block's
/// length.
#[inline(always)]
pub(super) fn sink(s: Sink, n: usize, tmp: &mut [f64], f: impl Fn(usize) -> f64) {
    match s {
        Sink::Store(o) => {
            for (r, x) in o[..n].iter_mut().enumerate() {
                *x = f(r);
            }
        }
        Sink::Add(o) => {
            for (r, x) in o[..n].iter_mut().enumerate() {
                *x += f(r);
            }
        }
        Sink::Lanes(l) => {
            // Into scratch, then into the lanes: two loops the compiler vectorises.
            let t = &mut tmp[..n];
            for (r, x) in t.iter_mut().enumerate() {
                *x = f(r);
            }
            add_lanes(l, t);
        }
    }
}

/// Adds `x[r]` to lane `r mod LANES` (a block starts at a multiple of [`LANES`]).
#[inline(always)]
pub(super) fn add_lanes(l: &mut Lanes, x: &[f64]) {
    let mut acc = *l;
    let mut chunks = x.chunks_exact(LANES);
    for c in &mut chunks {
        for i in 0..LANES {
            acc[i] += c[i];
        }
    }
    for (i, &y) in chunks.remainder().iter().enumerate() {
        acc[i] += y;
    }
    *l = acc;
}

/// Whether `x * (1/d)` may stand for `x / d`: the reciprocal is a normal number (so it is
/// within half an ulp), or `d` is zero, infinite or NaN (where the two agree exactly).
#[inline(always)]
pub(super) fn reciprocal_ok(d: f64) -> bool {
    let r = 1.0 / d;
    r.is_normal() || !d.is_finite() || d == 0.0
}

#[inline(always)]
pub(super) fn map1(a: Src, out: &mut [f64], f: impl Fn(f64) -> f64) {
    match a {
        Src::Col(x) => {
            for (o, &x) in out.iter_mut().zip(x) {
                *o = f(x);
            }
        }
        Src::Val(x) => out.fill(f(x)),
    }
}

#[inline(always)]
pub(super) fn map2(a: Src, b: Src, out: &mut [f64], f: impl Fn(f64, f64) -> f64) {
    match (a, b) {
        (Src::Col(x), Src::Col(y)) => {
            for ((o, &x), &y) in out.iter_mut().zip(x).zip(y) {
                *o = f(x, y);
            }
        }
        (Src::Col(x), Src::Val(y)) => {
            for (o, &x) in out.iter_mut().zip(x) {
                *o = f(x, y);
            }
        }
        (Src::Val(x), Src::Col(y)) => {
            for (o, &y) in out.iter_mut().zip(y) {
                *o = f(x, y);
            }
        }
        (Src::Val(x), Src::Val(y)) => out.fill(f(x, y)),
    }
}

/// One instruction over a block of rows. In gradient mode sine and cosine also leave their
/// derivative in `aux`.
#[inline(never)]
pub(super) fn col_forward<const GRAD: bool>(
    op: COp,
    a: Src,
    b: Src,
    out: &mut [f64],
    aux: &mut [f64],
) {
    match op {
        COp::Bin(Binary::Add) => map2(a, b, out, |x, y| x + y),
        COp::Bin(Binary::Sub) => map2(a, b, out, |x, y| x - y),
        COp::Bin(Binary::Mul) => map2(a, b, out, |x, y| x * y),
        COp::Bin(Binary::Div) => match b {
            Src::Val(d) if reciprocal_ok(d) => map2(a, Src::Val(1.0 / d), out, |x, r| x * r),
            _ => map2(a, b, out, |x, y| x / y),
        },
        COp::Bin(Binary::Pow) => map2(a, b, out, maths::pow),
        COp::Bin(op) => map2(a, b, out, |x, y| op.apply(x, y)),
        COp::Un(Unary::Neg) => map1(a, out, |x| -x),
        COp::Un(Unary::Abs) => map1(a, out, f64::abs),
        COp::Un(Unary::Exp) => map1(a, out, maths::exp),
        COp::Un(Unary::Log) => map1(a, out, maths::ln),
        COp::Un(Unary::Log1p) => map1(a, out, maths::ln_1p),
        COp::Un(u @ (Unary::Sin | Unary::Cos)) if GRAD => {
            for (r, (o, d)) in out.iter_mut().zip(aux.iter_mut()).enumerate() {
                let (s, c) = libm::sincos(a.at(r));
                (*o, *d) = if u == Unary::Sin { (s, c) } else { (c, -s) };
            }
        }
        COp::Un(u) => map1(a, out, |x| u.apply(x)),
        COp::Square => map1(a, out, |x| x * x),
        COp::PowI(n) => map1(a, out, |x| powi_small(x, n)),
        COp::PowC(c) => map1(a, out, |x| maths::pow(x, c)),
    }
}

/// A zero adjoint passes nothing on, even through an infinite or NaN derivative.
#[inline(always)]
pub(super) fn mask(g: f64, d: f64) -> f64 {
    if g == 0.0 {
        0.0
    } else {
        g * d
    }
}

/// Sends operand `w`'s share of the adjoint `g` of one instruction (operands `a`, `b`, value
/// `v`, auxiliary column `aux`) to its sink. Each kind of derivative is a small function of
/// its own (`drive_*`), so that the compiler inlines its arithmetic into the row loops.
#[allow(clippy::too_many_arguments)]
#[inline(never)]
pub(super) fn col_partial(
    op: COp,
    w: usize,
    g: Src,
    a: Src,
    b: Src,
    v: &[f64],
    aux: &[f64],
    s: Sink,
    tmp: &mut [f64],
) {
    let n = v.len();
    let vs = Src::Col(v);
    match (op, w) {
        (COp::Bin(Binary::Add), _) | (COp::Bin(Binary::Sub), 0) => drive_g(s, n, tmp, g, |g| g),
        (COp::Bin(Binary::Sub), _) | (COp::Un(Unary::Neg), _) => drive_g(s, n, tmp, g, |g| -g),
        (COp::Bin(Binary::Mul), 0) => drive_ga(s, n, tmp, g, b, mask),
        (COp::Bin(Binary::Mul), _) => drive_ga(s, n, tmp, g, a, mask),
        (COp::Bin(Binary::Div), w) => match b {
            // A divisor the same on every row is applied as its reciprocal, as in
            // `col_forward`.
            Src::Val(d) if reciprocal_ok(d) => {
                let q = 1.0 / d;
                if w == 0 {
                    drive_g(s, n, tmp, g, move |g| mask(g, q))
                } else {
                    drive_ga(s, n, tmp, g, vs, move |g, v| mask(g, -v * q))
                }
            }
            _ if w == 0 => drive_ga(s, n, tmp, g, b, |g, b| mask(g, 1.0 / b)),
            _ => drive_gab(s, n, tmp, g, vs, b, |g, v, b| mask(g, -v / b)),
        },
        (COp::Bin(op), w) => {
            let k = move |g: f64, x: f64, y: f64, v: f64| {
                let (da, db) = op.derivatives(x, y, v);
                mask(g, if w == 0 { da } else { db })
            };
            drive_gabv(s, n, tmp, g, a, b, vs, k)
        }
        (COp::Un(Unary::Sin | Unary::Cos), _) => drive_ga(s, n, tmp, g, Src::Col(aux), mask),
        (COp::Un(Unary::Exp), _) => drive_ga(s, n, tmp, g, vs, mask),
        // The derivatives of `Unary::derivative`, written out so that the loop needs no match.
        (COp::Un(Unary::Log), _) => drive_ga(s, n, tmp, g, a, |g, x| mask(g, 1.0 / x)),
        (COp::Un(Unary::Log1p), _) => drive_ga(s, n, tmp, g, a, |g, x| mask(g, 1.0 / (1.0 + x))),
        (COp::Un(u), _) => drive_gab(s, n, tmp, g, a, vs, move |g, x, v| {
            mask(g, u.derivative(x, v))
        }),
        (COp::Square, _) => drive_ga(s, n, tmp, g, a, |g, x| mask(g, 2.0 * x)),
        (COp::PowI(k), _) => drive_ga(s, n, tmp, g, a, move |g, x| {
            let d = match k {
                0 => 0.0,
                1 => 1.0,
                2 => 2.0 * x,
                _ => k as f64 * powi_small(x, k - 1),
            };
            mask(g, d)
        }),
        (COp::PowC(c), _) => drive_ga(s, n, tmp, g, a, move |g, x| {
            mask(g, c * maths::pow(x, c - 1.0))
        }),
    }
}

/// A row loop over `n` rows reading one operand: `f(r)` from a column or a value.
macro_rules! reader {
    ($src:expr, $n:expr, |$f:ident| $body:expr) => {
        match $src {
            Src::Col(c) => {
                let c = &c[..$n];
                let $f = move |r: usize| c[r];
                $body
            }
            Src::Val(x) => {
                let $f = move |_: usize| x;
                $body
            }
        }
    };
}

/// The contribution `k(g)` of every row.
#[inline(never)]
pub(super) fn drive_g(s: Sink, n: usize, tmp: &mut [f64], g: Src, k: impl Fn(f64) -> f64 + Copy) {
    reader!(g, n, |gf| sink(s, n, tmp, move |r| k(gf(r))))
}

/// The contribution `k(g, x)` of every row.
#[inline(never)]
pub(super) fn drive_ga(
    s: Sink,
    n: usize,
    tmp: &mut [f64],
    g: Src,
    x: Src,
    k: impl Fn(f64, f64) -> f64 + Copy,
) {
    reader!(g, n, |gf| reader!(x, n, |xf| sink(s, n, tmp, move |r| k(
        gf(r),
        xf(r)
    ))))
}

/// The contribution `k(g, x, y)` of every row.
#[allow(clippy::too_many_arguments)]
#[inline(never)]
pub(super) fn drive_gab(
    s: Sink,
    n: usize,
    tmp: &mut [f64],
    g: Src,
    x: Src,
    y: Src,
    k: impl Fn(f64, f64, f64) -> f64 + Copy,
) {
    reader!(g, n, |gf| reader!(x, n, |xf| reader!(y, n, |yf| sink(
        s,
        n,
        tmp,
        move |r| k(gf(r), xf(r), yf(r))
    ))))
}

/// The contribution `k(g, x, y, v)` of every row (`v` a column).
#[allow(clippy::too_many_arguments)]
#[inline(never)]
pub(super) fn drive_gabv(
    s: Sink,
    n: usize,
    tmp: &mut [f64],
    g: Src,
    x: Src,
    y: Src,
    v: Src,
    k: impl Fn(f64, f64, f64, f64) -> f64 + Copy,
) {
    let v = match v {
        Src::Col(v) => &v[..n],
        Src::Val(_) => &[][..],
    };
    reader!(g, n, |gf| reader!(x, n, |xf| reader!(y, n, |yf| sink(
        s,
        n,
        tmp,
        move |r| k(gf(r), xf(r), yf(r), v[r])
    ))))
}
