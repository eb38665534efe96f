//! Modified nodal analysis: one stamp per element kind into `G`, `C` and `b`.
//!
//! The unknowns `x` are the voltages of the non-ground nodes, followed by one branch current
//! for each part whose current cannot be written from node voltages (inductors, voltage
//! sources, voltage-output controlled sources, op-amp outputs) and one internal state for each
//! single-pole op-amp. At angular frequency ω the network obeys
//!
//! ```text
//! (G + jω·C) · x = b
//! ```
//!
//! where node rows are Kirchhoff's current law (current leaving the node through the parts
//! equals current injected by sources) and branch rows are the parts' own voltage laws:
//! inductor `v_a − v_b − jωL·i = 0` (with `− jωM·i₂` for a coupling), voltage source
//! `v+ − v− = V`, op-amp `v+ − v− = 0` (ideal) or `x − A0·(v+ − v−) + jω·(A0/2πGBW)·x = 0`
//! with `v_out = x` (single pole). `G`, `C` and `b` do not depend on ω: they are assembled
//! once and every frequency point only forms `G + jωC`.

use crate::network::{Network, NodeId, Param, PartId, PartKind};
use num_complex::Complex64;
use std::f64::consts::PI;

/// What an unknown of the system stands for (for messages).
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Unknown {
    /// The voltage of a node.
    Node(NodeId),
    /// The branch current of a part.
    Branch(PartId),
    /// The internal state of a single-pole op-amp.
    OpampState(PartId),
}

/// A linear read-out of the solution: `Σ g·x + jω·Σ c·x + constant`.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct Readout {
    /// Frequency-independent terms.
    pub g: Vec<(usize, f64)>,
    /// Terms multiplied by jω.
    pub c: Vec<(usize, f64)>,
    /// A constant (the phasor of an independent current source); applies only under the
    /// design's own excitation, never under a test excitation.
    pub constant: Complex64,
}

impl Readout {
    /// Evaluates the read-out on solution `x` at angular frequency `omega`.
    pub fn eval(&self, x: &[Complex64], omega: f64, with_constant: bool) -> Complex64 {
        self.eval_at(x, Complex64::new(0.0, omega), with_constant)
    }

    /// Evaluates the read-out on solution `x` at the complex frequency `s` (its `C` terms
    /// times s; [`Readout::eval`] is s = jω).
    pub fn eval_at(&self, x: &[Complex64], s: Complex64, with_constant: bool) -> Complex64 {
        let mut g = Complex64::new(0.0, 0.0);
        for &(i, w) in &self.g {
            g += x.get(i).copied().unwrap_or_default() * w;
        }
        let mut c = Complex64::new(0.0, 0.0);
        for &(i, w) in &self.c {
            c += x.get(i).copied().unwrap_or_default() * w;
        }
        let mut v = g + s * c;
        if with_constant {
            v += self.constant;
        }
        v
    }

    /// The derivative of the read-out with respect to ω, given `x` and `dx/dω`.
    pub fn eval_derivative(&self, x: &[Complex64], dx: &[Complex64], omega: f64) -> Complex64 {
        let mut v = Complex64::new(0.0, 0.0);
        for &(i, w) in &self.g {
            v += dx.get(i).copied().unwrap_or_default() * w;
        }
        let j = Complex64::new(0.0, 1.0);
        for &(i, w) in &self.c {
            let xi = x.get(i).copied().unwrap_or_default();
            let dxi = dx.get(i).copied().unwrap_or_default();
            v += j * w * (xi + dxi * omega);
        }
        v
    }
}

/// The assembled system: pattern and values of `G` and `C` (one union pattern, sorted by
/// column then row, no duplicates), the design's right-hand side `b`, and what each unknown is.
#[derive(Clone, Debug)]
pub struct System {
    /// Number of unknowns.
    pub n: usize,
    /// (row, column) of each stored entry, sorted by column then row.
    pub pattern: Vec<(usize, usize)>,
    /// Value of `G` at each entry.
    pub g: Vec<f64>,
    /// Value of `C` at each entry.
    pub c: Vec<f64>,
    /// Right-hand side under the design's own sources.
    pub b: Vec<Complex64>,
    /// Meaning of each unknown.
    pub unknowns: Vec<Unknown>,
    branch: Vec<Option<usize>>,
    /// Per row, Σ|g| and Σ|c| (for the residual check's norm).
    row_abs: Vec<(f64, f64)>,
    /// Per column, Σ|g| and Σ|c| (the rows of the transpose, for transposed solves).
    col_abs: Vec<(f64, f64)>,
}

struct Stamper {
    triplets: Vec<(usize, usize, f64, f64)>,
    b: Vec<Complex64>,
}

fn idx(node: NodeId) -> Option<usize> {
    node.0.checked_sub(1)
}

/// Indices of `t` ordered by (column, row), entries of equal position in their order in
/// `t`: a counting sort by column, then a stable sort by row within each column.
fn column_major_order(t: &[(usize, usize, f64, f64)]) -> Vec<u32> {
    let columns = t.iter().map(|e| e.1 + 1).max().unwrap_or(0);
    let mut start = vec![0u32; columns + 1];
    for e in t {
        start[e.1 + 1] += 1;
    }
    for k in 0..columns {
        start[k + 1] += start[k];
    }
    let mut order = vec![0u32; t.len()];
    let mut next = start.clone();
    for (i, e) in t.iter().enumerate() {
        order[next[e.1] as usize] = i as u32;
        next[e.1] += 1;
    }
    drop(next);
    for k in 0..columns {
        order[start[k] as usize..start[k + 1] as usize].sort_by_key(|&i| t[i as usize].0);
    }
    order
}

impl Stamper {
    fn g(&mut self, r: Option<usize>, c: Option<usize>, v: f64) {
        if let (Some(r), Some(c)) = (r, c) {
            self.triplets.push((r, c, v, 0.0));
        }
    }
    fn c(&mut self, r: Option<usize>, c: Option<usize>, v: f64) {
        if let (Some(r), Some(c)) = (r, c) {
            self.triplets.push((r, c, 0.0, v));
        }
    }
    fn rhs(&mut self, r: Option<usize>, v: Complex64) {
        if let Some(slot) = r.and_then(|r| self.b.get_mut(r)) {
            *slot += v;
        }
    }
    /// A two-terminal admittance between a and b, into G (`freq = false`) or C.
    fn admittance(&mut self, a: NodeId, b: NodeId, y: f64, freq: bool) {
        let (a, b) = (idx(a), idx(b));
        let put = |s: &mut Self, r, c, v| if freq { s.c(r, c, v) } else { s.g(r, c, v) };
        put(self, a, a, y);
        put(self, b, b, y);
        put(self, a, b, -y);
        put(self, b, a, -y);
    }
    /// Branch current k leaves node `plus` and enters node `minus` (KCL columns), and the
    /// branch row reads v_plus − v_minus.
    fn branch(&mut self, k: usize, plus: NodeId, minus: NodeId) {
        let (p, m) = (idx(plus), idx(minus));
        self.g(p, Some(k), 1.0);
        self.g(m, Some(k), -1.0);
        self.g(Some(k), p, 1.0);
        self.g(Some(k), m, -1.0);
    }
    /// Adds `scale · readout` into row r (G and C terms) and `scale · constant` to b.
    fn readout_into(&mut self, r: Option<usize>, ro: &Readout, scale: f64) {
        for &(i, w) in &ro.g {
            self.g(r, Some(i), scale * w);
        }
        for &(i, w) in &ro.c {
            self.c(r, Some(i), scale * w);
        }
        self.rhs(r, -ro.constant * scale);
    }
}

impl System {
    /// Assembles the system of a network. Never fails: every reference was checked when the
    /// network was built.
    pub fn assemble(net: &Network) -> System {
        let nodes = net.node_count().saturating_sub(1);
        let mut unknowns: Vec<Unknown> = (1..=nodes).map(|i| Unknown::Node(NodeId(i))).collect();
        let mut branch = vec![None; net.parts().len()];
        let mut state = vec![None; net.parts().len()];
        for (i, part) in net.parts().iter().enumerate() {
            match part.kind {
                PartKind::Inductor { .. }
                | PartKind::VoltageSource { .. }
                | PartKind::Vcvs { .. }
                | PartKind::Ccvs { .. }
                | PartKind::IdealOpamp { .. } => {
                    branch[i] = Some(unknowns.len());
                    unknowns.push(Unknown::Branch(PartId(i)));
                }
                PartKind::SinglePoleOpamp { .. } => {
                    state[i] = Some(unknowns.len());
                    unknowns.push(Unknown::OpampState(PartId(i)));
                    branch[i] = Some(unknowns.len());
                    unknowns.push(Unknown::Branch(PartId(i)));
                }
                _ => {}
            }
        }
        let n = unknowns.len();
        let mut sys = System {
            n,
            pattern: Vec::new(),
            g: Vec::new(),
            c: Vec::new(),
            b: Vec::new(),
            unknowns,
            branch,
            row_abs: vec![(0.0, 0.0); n],
            col_abs: vec![(0.0, 0.0); n],
        };
        let mut st = Stamper {
            triplets: Vec::with_capacity(4 * net.parts().len() + n),
            b: vec![Complex64::new(0.0, 0.0); n],
        };
        for (i, part) in net.parts().iter().enumerate() {
            let k = sys.branch[i];
            stamp(&mut st, &sys, net, &part.kind, k, state[i]);
        }
        // Order by (column, row) and merge duplicates: a counting sort by column, then each
        // column's few entries by row, both stable, so the entries of one position are
        // summed in the order the parts stamped them. Only a list of indices is sorted; the
        // merged entries are written out at their exact size.
        let t = std::mem::take(&mut st.triplets);
        let order = column_major_order(&t);
        let mut kept: Vec<(usize, usize)> = Vec::with_capacity(t.len());
        let (mut g, mut c) = (Vec::with_capacity(t.len()), Vec::with_capacity(t.len()));
        for &i in &order {
            let (r, col, gv, cv) = t[i as usize];
            if kept.last() == Some(&(r, col)) {
                if let (Some(gl), Some(cl)) = (g.last_mut(), c.last_mut()) {
                    *gl += gv;
                    *cl += cv;
                }
            } else {
                kept.push((r, col));
                g.push(gv);
                c.push(cv);
            }
        }
        drop(t);
        drop(order);
        sys.pattern = kept;
        sys.pattern.shrink_to_fit();
        (sys.g, sys.c) = (g, c);
        sys.g.shrink_to_fit();
        sys.c.shrink_to_fit();
        sys.sum_abs();
        sys.b = st.b;
        sys
    }

    /// The row and column sums of |g| and |c| the residual checks take their norms from.
    fn sum_abs(&mut self) {
        self.row_abs = vec![(0.0, 0.0); self.n];
        self.col_abs = vec![(0.0, 0.0); self.n];
        for (k, &(r, c)) in self.pattern.iter().enumerate() {
            if let Some(row) = self.row_abs.get_mut(r) {
                row.0 += self.g[k].abs();
                row.1 += self.c[k].abs();
            }
            if let Some(col) = self.col_abs.get_mut(c) {
                col.0 += self.g[k].abs();
                col.1 += self.c[k].abs();
            }
        }
    }

    /// The system at complex frequencies `σ + jω`: `G + σC` in place of `G`, so that its
    /// solves at ω are those of the network at `s = σ + jω` (same pattern, same solver paths).
    pub fn shifted(&self, sigma: f64) -> System {
        let mut sys = self.clone();
        for (g, c) in sys.g.iter_mut().zip(&self.c) {
            *g += sigma * c;
        }
        sys.sum_abs();
        sys
    }

    /// The branch-current unknown of a part, where it has one.
    pub fn branch_of(&self, part: PartId) -> Option<usize> {
        self.branch.get(part.0).copied().flatten()
    }

    /// The unknown index of a node voltage (None for ground).
    pub fn node_index(node: NodeId) -> Option<usize> {
        idx(node)
    }

    /// Read-out of the voltage V(a) − V(b).
    pub fn voltage_readout(a: NodeId, b: NodeId) -> Readout {
        let mut r = Readout::default();
        if let Some(i) = idx(a) {
            r.g.push((i, 1.0));
        }
        if let Some(i) = idx(b) {
            r.g.push((i, -1.0));
        }
        r
    }

    /// Read-out of a part's current (through the part from its first node to its second; for
    /// an op-amp, the current its output drives into the output node). None where the part
    /// has no current of its own (a coupling, a cccs).
    pub fn current_readout(&self, net: &Network, part: PartId) -> Option<Readout> {
        let p = net.part(part)?;
        let mut r = Readout::default();
        match p.kind {
            PartKind::Resistor { a, b, ohms } => {
                r = Self::voltage_readout(a, b);
                for t in &mut r.g {
                    t.1 /= ohms;
                }
            }
            PartKind::Capacitor { a, b, farads } => {
                r.c = Self::voltage_readout(a, b).g;
                for t in &mut r.c {
                    t.1 *= farads;
                }
            }
            PartKind::Inductor { .. }
            | PartKind::VoltageSource { .. }
            | PartKind::Vcvs { .. }
            | PartKind::Ccvs { .. } => r.g.push((self.branch_of(part)?, 1.0)),
            PartKind::IdealOpamp { .. } | PartKind::SinglePoleOpamp { .. } => {
                r.g.push((self.branch_of(part)?, -1.0))
            }
            PartKind::CurrentSource { phasor, .. } => r.constant = phasor,
            PartKind::Vccs { cp, cn, gm, .. } => {
                r = Self::voltage_readout(cp, cn);
                for t in &mut r.g {
                    t.1 *= gm;
                }
            }
            PartKind::Coupling { .. } | PartKind::Cccs { .. } => return None,
        }
        Some(r)
    }

    /// How a part's current read-out scales with its value `param`: as 1/R for a resistor
    /// (−1), as C for a capacitor and gm for a vccs (+1), not at all otherwise (0). The
    /// read-outs of responses and of current-controlled sources follow this.
    pub fn readout_exponent(net: &Network, part: PartId, param: Param) -> f64 {
        match (net.part(part).map(|p| &p.kind), param) {
            (Some(PartKind::Resistor { .. }), Param::Main) => -1.0,
            (Some(PartKind::Capacitor { .. } | PartKind::Vccs { .. }), Param::Main) => 1.0,
            _ => 0.0,
        }
    }

    /// The derivative of the system with respect to the log of one value,
    /// `∂(G, C, b)/∂ln p`: the entries `(row, column, ∂g, ∂c)` (unsorted; a position may
    /// repeat, the entries then add) and the changed right-hand-side entries. Exact: each
    /// stamp is linear in p or in 1/p, except a coupling's M = k·√(L1·L2), whose derivative
    /// with respect to ln L1 is M/2. Includes the parts that depend on this one (couplings
    /// of an inductor, sources controlled by a resistor's, capacitor's or vccs's current).
    #[allow(clippy::type_complexity)]
    pub fn derivative(
        &self,
        net: &Network,
        part: PartId,
        param: Param,
    ) -> (Vec<(usize, usize, f64, f64)>, Vec<(usize, Complex64)>) {
        let mut st = Stamper {
            triplets: Vec::new(),
            b: vec![Complex64::default(); self.n],
        };
        let Some(p) = net.part(part) else {
            return (Vec::new(), Vec::new());
        };
        let k = self.branch_of(part);
        let state = self
            .unknowns
            .iter()
            .position(|u| *u == Unknown::OpampState(part));
        let inductance = |q: PartId| match net.part(q).map(|p| &p.kind) {
            Some(PartKind::Inductor { henries, .. }) => *henries,
            _ => 0.0,
        };
        match (&p.kind, param) {
            (&PartKind::Resistor { a, b, ohms }, Param::Main) => {
                st.admittance(a, b, -1.0 / ohms, false)
            }
            (&PartKind::Capacitor { a, b, farads }, Param::Main) => {
                st.admittance(a, b, farads, true)
            }
            (&PartKind::Inductor { henries, .. }, Param::Main) => st.c(k, k, -henries),
            (
                &PartKind::Coupling {
                    first,
                    second,
                    k: kc,
                },
                Param::Main,
            ) => {
                let m = kc * (inductance(first) * inductance(second)).sqrt();
                let (k1, k2) = (self.branch_of(first), self.branch_of(second));
                st.c(k1, k2, -m);
                st.c(k2, k1, -m);
            }
            (&PartKind::Vcvs { cp, cn, gain, .. }, Param::Main) => {
                st.g(k, idx(cp), -gain);
                st.g(k, idx(cn), gain);
            }
            (
                &PartKind::Vccs {
                    from,
                    to,
                    cp,
                    cn,
                    gm,
                },
                Param::Main,
            ) => {
                let (f, t) = (idx(from), idx(to));
                st.g(f, idx(cp), gm);
                st.g(f, idx(cn), -gm);
                st.g(t, idx(cp), -gm);
                st.g(t, idx(cn), gm);
            }
            (&PartKind::Ccvs { control, rm, .. }, Param::Main) => {
                if let Some(ro) = self.current_readout(net, control) {
                    st.readout_into(k, &ro, -rm);
                }
            }
            (
                &PartKind::Cccs {
                    from,
                    to,
                    control,
                    gain,
                },
                Param::Main,
            ) => {
                if let Some(ro) = self.current_readout(net, control) {
                    st.readout_into(idx(from), &ro, gain);
                    st.readout_into(idx(to), &ro, -gain);
                }
            }
            (
                &PartKind::SinglePoleOpamp {
                    noninverting,
                    inverting,
                    dc_gain,
                    gbw,
                    ..
                },
                Param::Main,
            ) => {
                st.c(state, state, dc_gain / (2.0 * PI * gbw));
                st.g(state, idx(noninverting), -dc_gain);
                st.g(state, idx(inverting), dc_gain);
            }
            (&PartKind::SinglePoleOpamp { dc_gain, gbw, .. }, Param::Gbw) => {
                st.c(state, state, -dc_gain / (2.0 * PI * gbw));
            }
            _ => {}
        }
        // The parts whose stamps read this one's value.
        let exponent = Self::readout_exponent(net, part, param);
        let is_inductor = matches!(p.kind, PartKind::Inductor { .. }) && param == Param::Main;
        for (j, other) in net.parts().iter().enumerate() {
            match other.kind {
                PartKind::Coupling {
                    first,
                    second,
                    k: kc,
                } if is_inductor && (first == part || second == part) => {
                    // M = k·√(L1·L2): ∂M/∂ln L1 = M/2 (M for a coupling of L with itself).
                    let m = kc * (inductance(first) * inductance(second)).sqrt();
                    let share = if first == second { 1.0 } else { 0.5 };
                    let (k1, k2) = (self.branch_of(first), self.branch_of(second));
                    st.c(k1, k2, -m * share);
                    st.c(k2, k1, -m * share);
                }
                PartKind::Ccvs { control, rm, .. } if control == part && exponent != 0.0 => {
                    if let Some(ro) = self.current_readout(net, part) {
                        st.readout_into(self.branch_of(PartId(j)), &ro, -rm * exponent);
                    }
                }
                PartKind::Cccs {
                    from,
                    to,
                    control,
                    gain,
                } if control == part && exponent != 0.0 => {
                    if let Some(ro) = self.current_readout(net, part) {
                        st.readout_into(idx(from), &ro, gain * exponent);
                        st.readout_into(idx(to), &ro, -gain * exponent);
                    }
                }
                _ => {}
            }
        }
        let rhs =
            st.b.iter()
                .enumerate()
                .filter(|(_, v)| v.norm() != 0.0)
                .map(|(i, v)| (i, *v))
                .collect();
        (st.triplets, rhs)
    }

    /// Right-hand side of a 1 A test current into node `a` and out of node `b`, all the
    /// design's sources off.
    pub fn injection_rhs(&self, a: NodeId, b: NodeId) -> Vec<Complex64> {
        let mut rhs = vec![Complex64::new(0.0, 0.0); self.n];
        if let Some(i) = idx(a) {
            rhs[i] += 1.0;
        }
        if let Some(i) = idx(b) {
            rhs[i] -= 1.0;
        }
        rhs
    }

    /// Right-hand side of the voltage source `part` set to 1 V, all other sources off.
    pub fn source_drive_rhs(&self, part: PartId) -> Option<Vec<Complex64>> {
        let k = self.branch_of(part)?;
        let mut rhs = vec![Complex64::new(0.0, 0.0); self.n];
        rhs[k] = Complex64::new(1.0, 0.0);
        Some(rhs)
    }

    /// Writes `G + jωC` into a dense column-major n×n buffer (zeroing it first).
    pub fn fill_dense(&self, omega: f64, a: &mut [Complex64]) {
        a.iter_mut().for_each(|v| *v = Complex64::new(0.0, 0.0));
        let n = self.n;
        for (k, &(r, c)) in self.pattern.iter().enumerate() {
            if let Some(slot) = a.get_mut(c * n + r) {
                *slot = Complex64::new(self.g[k], omega * self.c[k]);
            }
        }
    }

    /// `y = (G + jωC)·x` (for residuals), or with `derivative_only`, `y = jC·x`.
    pub fn multiply(
        &self,
        omega: f64,
        x: &[Complex64],
        y: &mut [Complex64],
        derivative_only: bool,
    ) {
        y.iter_mut().for_each(|v| *v = Complex64::new(0.0, 0.0));
        for (k, &(r, c)) in self.pattern.iter().enumerate() {
            let a = if derivative_only {
                Complex64::new(0.0, self.c[k])
            } else {
                Complex64::new(self.g[k], omega * self.c[k])
            };
            if let (Some(yr), Some(xc)) = (y.get(r).copied(), x.get(c)) {
                y[r] = yr + a * xc;
            }
        }
    }

    /// Per row, Σ|g| and Σ|c| over the stored entries.
    pub fn row_abs(&self) -> &[(f64, f64)] {
        &self.row_abs
    }

    /// Per column, Σ|g| and Σ|c| over the stored entries (the rows of `(G + jωC)ᵀ`).
    pub fn col_abs(&self) -> &[(f64, f64)] {
        &self.col_abs
    }

    /// `y = (G + jωC)ᵀ·x` (no conjugation), for the residuals of transposed solves.
    pub fn multiply_transposed(&self, omega: f64, x: &[Complex64], y: &mut [Complex64]) {
        y.iter_mut().for_each(|v| *v = Complex64::new(0.0, 0.0));
        for (k, &(r, c)) in self.pattern.iter().enumerate() {
            let a = Complex64::new(self.g[k], omega * self.c[k]);
            if let (Some(yc), Some(xr)) = (y.get(c).copied(), x.get(r)) {
                y[c] = yc + a * xr;
            }
        }
    }

    /// `‖(G + jωC)ᵀ‖∞` bounded from the stored column sums, as [`System::norm_inf`].
    pub fn norm_inf_transposed(&self, omega: f64) -> f64 {
        self.col_abs
            .iter()
            .map(|&(g, c)| g + omega.abs() * c)
            .fold(0.0, f64::max)
    }

    /// `‖G + jωC‖∞` bounded by `max_i (Σ|g_ij| + ω·Σ|c_ij|)` from the stored row sums, with
    /// |z| taken as |Re z| + |Im z|.
    pub fn norm_inf(&self, omega: f64) -> f64 {
        self.row_abs
            .iter()
            .map(|&(g, c)| g + omega.abs() * c)
            .fold(0.0, f64::max)
    }

    /// A human label for unknown `i`.
    pub fn describe_unknown(&self, net: &Network, i: usize) -> String {
        match self.unknowns.get(i) {
            Some(Unknown::Node(n)) => format!("node {}", net.node_name(*n)),
            Some(Unknown::Branch(p)) => {
                let part = net.part(*p);
                match part.map(|p| &p.kind) {
                    Some(PartKind::IdealOpamp { .. } | PartKind::SinglePoleOpamp { .. }) => {
                        format!("the output of op-amp {}", part.map_or("?", |p| &p.name))
                    }
                    _ => format!("the current of {}", part.map_or("?", |p| &p.name)),
                }
            }
            Some(Unknown::OpampState(p)) => format!(
                "the internal state of op-amp {}",
                net.part(*p).map_or("?", |p| &p.name)
            ),
            None => format!("unknown {i}"),
        }
    }
}

fn stamp(
    st: &mut Stamper,
    sys: &System,
    net: &Network,
    kind: &PartKind,
    k: Option<usize>,
    state: Option<usize>,
) {
    match *kind {
        PartKind::Resistor { a, b, ohms } => st.admittance(a, b, 1.0 / ohms, false),
        PartKind::Capacitor { a, b, farads } => st.admittance(a, b, farads, true),
        PartKind::Inductor { a, b, henries } => {
            if let Some(k) = k {
                st.branch(k, a, b);
                st.c(Some(k), Some(k), -henries);
            }
        }
        PartKind::Coupling { first, second, k } => {
            let l = |p: PartId| match net.part(p).map(|p| &p.kind) {
                Some(PartKind::Inductor { henries, .. }) => *henries,
                _ => 0.0,
            };
            let m = k * (l(first) * l(second)).sqrt();
            let (k1, k2) = (sys.branch_of(first), sys.branch_of(second));
            st.c(k1, k2, -m);
            st.c(k2, k1, -m);
        }
        PartKind::VoltageSource {
            plus,
            minus,
            phasor,
        } => {
            if let Some(k) = k {
                st.branch(k, plus, minus);
                st.rhs(Some(k), phasor);
            }
        }
        PartKind::CurrentSource { from, to, phasor } => {
            st.rhs(idx(from), -phasor);
            st.rhs(idx(to), phasor);
        }
        PartKind::Vcvs {
            plus,
            minus,
            cp,
            cn,
            gain,
        } => {
            if let Some(k) = k {
                st.branch(k, plus, minus);
                st.g(Some(k), idx(cp), -gain);
                st.g(Some(k), idx(cn), gain);
            }
        }
        PartKind::Vccs {
            from,
            to,
            cp,
            cn,
            gm,
        } => {
            let (f, t) = (idx(from), idx(to));
            st.g(f, idx(cp), gm);
            st.g(f, idx(cn), -gm);
            st.g(t, idx(cp), -gm);
            st.g(t, idx(cn), gm);
        }
        PartKind::Ccvs {
            plus,
            minus,
            control,
            rm,
        } => {
            if let (Some(k), Some(ro)) = (k, sys.current_readout(net, control)) {
                st.branch(k, plus, minus);
                st.readout_into(Some(k), &ro, -rm);
            }
        }
        PartKind::Cccs {
            from,
            to,
            control,
            gain,
        } => {
            if let Some(ro) = sys.current_readout(net, control) {
                st.readout_into(idx(from), &ro, gain);
                st.readout_into(idx(to), &ro, -gain);
            }
        }
        PartKind::IdealOpamp {
            noninverting,
            inverting,
            output,
        } => {
            if let Some(k) = k {
                st.g(idx(output), Some(k), 1.0);
                st.g(Some(k), idx(noninverting), 1.0);
                st.g(Some(k), idx(inverting), -1.0);
            }
        }
        PartKind::SinglePoleOpamp {
            noninverting,
            inverting,
            output,
            dc_gain,
            gbw,
        } => {
            if let (Some(k), Some(s)) = (k, state) {
                // x − A0·(v+ − v−) + jω·(A0 / (2π·GBW))·x = 0, v_out − x = 0.
                st.g(Some(s), Some(s), 1.0);
                st.c(Some(s), Some(s), dc_gain / (2.0 * PI * gbw));
                st.g(Some(s), idx(noninverting), -dc_gain);
                st.g(Some(s), idx(inverting), dc_gain);
                st.g(idx(output), Some(k), 1.0);
                st.g(Some(k), idx(output), 1.0);
                st.g(Some(k), Some(s), -1.0);
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::network::NetworkBuilder;

    /// Column-major order, rows ascending within a column, and entries of one position in
    /// the order they were stamped (so their sum does not depend on a sort's internals).
    #[test]
    fn entries_order_by_column_then_row_keeping_stamp_order() {
        let t: Vec<(usize, usize, f64, f64)> = [
            (2, 1, 0.0),
            (0, 1, 1.0),
            (2, 1, 2.0),
            (1, 0, 3.0),
            (0, 3, 4.0),
            (2, 1, 5.0),
            (0, 0, 6.0),
            (1, 1, 7.0),
        ]
        .iter()
        .map(|&(r, c, v)| (r, c, v, 0.0))
        .collect();
        let order: Vec<f64> = column_major_order(&t)
            .iter()
            .map(|&i| t[i as usize].2)
            .collect();
        assert_eq!(order, [6.0, 3.0, 1.0, 7.0, 0.0, 2.0, 5.0, 4.0]);
        assert!(column_major_order(&[]).is_empty());
        // A column far longer than a row's handful (a node shared by many parts).
        let star: Vec<(usize, usize, f64, f64)> = (0..5000)
            .map(|k| ((7919 * k) % 5000, 0, k as f64, 0.0))
            .collect();
        let rows: Vec<usize> = column_major_order(&star)
            .iter()
            .map(|&i| star[i as usize].0)
            .collect();
        assert!(rows.windows(2).all(|w| w[0] < w[1]));
    }

    fn dense(sys: &System, omega: f64) -> Vec<Complex64> {
        let mut a = vec![Complex64::default(); sys.n * sys.n];
        sys.fill_dense(omega, &mut a);
        a
    }

    fn at(a: &[Complex64], n: usize, r: usize, c: usize) -> Complex64 {
        a[c * n + r]
    }

    // One stamp test per element kind: the entries MNA prescribes (common practice).
    #[test]
    fn resistor_capacitor_inductor_stamps() {
        let mut b = NetworkBuilder::new("t");
        b.resistor("R1", "a", "b", 2.0).unwrap();
        b.capacitor("C1", "b", "gnd", 3.0).unwrap();
        b.inductor("L1", "a", "gnd", 5.0).unwrap();
        let net = b.build().unwrap();
        let sys = System::assemble(&net);
        assert_eq!(sys.n, 3);
        let a = dense(&sys, 7.0);
        assert_eq!(at(&a, 3, 0, 0), Complex64::new(0.5, 0.0));
        assert_eq!(at(&a, 3, 0, 1), Complex64::new(-0.5, 0.0));
        assert_eq!(at(&a, 3, 1, 1), Complex64::new(0.5, 21.0));
        assert_eq!(at(&a, 3, 0, 2), Complex64::new(1.0, 0.0));
        assert_eq!(at(&a, 3, 2, 0), Complex64::new(1.0, 0.0));
        assert_eq!(at(&a, 3, 2, 2), Complex64::new(0.0, -35.0));
    }

    #[test]
    fn source_and_controlled_source_stamps() {
        let mut b = NetworkBuilder::new("t");
        b.voltage_source("V1", "a", "gnd", Complex64::new(2.0, 1.0))
            .unwrap();
        b.current_source("I1", "gnd", "b", Complex64::new(3.0, 0.0))
            .unwrap();
        b.vccs("gm_stage", ("b", "gnd"), ("a", "gnd"), 0.25)
            .unwrap();
        b.vcvs("diff_amp", ("c", "gnd"), ("a", "b"), 4.0).unwrap();
        let net = b.build().unwrap();
        let sys = System::assemble(&net);
        // Unknowns: a b c, V1, diff_amp.
        assert_eq!(sys.n, 5);
        let a = dense(&sys, 1.0);
        assert_eq!(sys.b[3], Complex64::new(2.0, 1.0));
        assert_eq!(sys.b[1], Complex64::new(3.0, 0.0));
        // gm_stage takes 0.25·V(a) out of node b (current flows through it from b to gnd).
        assert_eq!(at(&a, 5, 1, 0), Complex64::new(0.25, 0.0));
        assert_eq!(at(&a, 5, 4, 2), Complex64::new(1.0, 0.0));
        assert_eq!(at(&a, 5, 4, 0), Complex64::new(-4.0, 0.0));
        assert_eq!(at(&a, 5, 4, 1), Complex64::new(4.0, 0.0));
    }

    #[test]
    fn current_controlled_coupling_and_opamp_stamps() {
        let mut b = NetworkBuilder::new("t");
        b.inductor("L1", "a", "gnd", 4.0).unwrap();
        b.inductor("L2", "b", "gnd", 9.0).unwrap();
        b.coupling("coil_coupling", "L1", "L2", 0.5).unwrap();
        b.ccvs("sense_amp", ("c", "gnd"), "L1", 10.0).unwrap();
        b.cccs("mirror", ("gnd", "b"), "L2", 3.0).unwrap();
        b.single_pole_opamp("U1", "a", "b", "d", 1e5, 1e6).unwrap();
        let net = b.build().unwrap();
        let sys = System::assemble(&net);
        // Unknowns: a b c d, L1, L2, sense_amp, U1 state, U1 output.
        assert_eq!(sys.n, 9);
        let a = dense(&sys, 1.0);
        // M = 0.5·√(4·9) = 3.
        assert_eq!(at(&a, 9, 4, 5), Complex64::new(0.0, -3.0));
        assert_eq!(at(&a, 9, 5, 4), Complex64::new(0.0, -3.0));
        assert_eq!(at(&a, 9, 6, 4), Complex64::new(-10.0, 0.0));
        // mirror drives 3·I(L2) into node b: KCL row b gets −3 on I(L2), plus L2's own +1.
        assert_eq!(at(&a, 9, 1, 5), Complex64::new(1.0 - 3.0, 0.0));
        assert_eq!(at(&a, 9, 7, 0), Complex64::new(-1e5, 0.0));
        let tau = 1e5 / (2.0 * PI * 1e6);
        assert_eq!(at(&a, 9, 7, 7), Complex64::new(1.0, tau));
        assert_eq!(at(&a, 9, 8, 3), Complex64::new(1.0, 0.0));
        assert_eq!(at(&a, 9, 3, 8), Complex64::new(1.0, 0.0));
    }
}
