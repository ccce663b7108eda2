// Matrix code: index loops mirror the maths (rows, columns) more clearly than iterators.
#![allow(clippy::needless_range_loop)]

//! Linear nodes out of the Newton system. A node that no valve and no Zener touches (a coupling cap's far side,
//! a pot's wiper, every node of the tone stack) obeys a linear equation whose coefficients change only when a pot
//! moves. Grouping such nodes into clusters (connected through linear parts) and eliminating each cluster c by its
//! Schur complement (block Gaussian elimination) leaves the equations of the device nodes D alone:
//!
//! (G_DD - G_Dc G_cc^-1 G_cD) v_D = h_D - G_Dc G_cc^-1 h_c,    then    v_c = G_cc^-1 h_c - G_cc^-1 G_cD v_D,
//!
//! with G the conductances and h the given currents. The reduced matrix is computed when the network changes;
//! each sample costs the two small products above per cluster, and Newton's method works on the device nodes
//! only.

use crate::lane::Lane;

/// One group of linear nodes joined by linear parts, and the device nodes next to it.
#[derive(Clone, Debug)]
struct Cluster {
    /// Node indices (full numbering).
    nodes: Vec<usize>,
    /// Adjacent device nodes: full and reduced indices.
    neighbours: Vec<usize>,
    neighbours_reduced: Vec<usize>,
    /// G_cc^-1 (c x c), G_cc^-1 G_cD (c x nb) and G_Dc G_cc^-1 (nb x c), row-major.
    inverse: Vec<f64>,
    recover: Vec<f64>,
    feed: Vec<f64>,
    /// Working copy of G_cc for the inversion.
    work: Vec<f64>,
    /// Where this cluster's G_cc^-1 h_c starts in the shared scratch.
    offset: usize,
}

/// The device nodes kept as unknowns, the linear clusters eliminated, and the matrices that do it.
#[derive(Clone, Debug)]
pub struct Condensation {
    size: usize,
    /// Full index of each kept (device) node, in the original order.
    pub device: Vec<usize>,
    /// The kept index of each node, None for a linear one.
    pub reduced_of: Vec<Option<usize>>,
    clusters: Vec<Cluster>,
    linear_count: usize,
    /// Each capacitor's terminals (full numbering; None for ground or a source).
    caps: Vec<[Option<usize>; 2]>,
    /// How a capacitor's history current reaches the kept nodes' given currents and the clusters' G_cc^-1 h_c:
    /// per capacitor, (row, weight) pairs (`Columns`).
    cap_to_kept: Columns,
    cap_to_linear: Columns,
    recovery: Recovery,
    /// The kept nodes' and the clusters' given currents from the rails, and per volt at the jack.
    rails_kept: Vec<f64>,
    rails_linear: Vec<f64>,
    jack_kept: Vec<f64>,
    jack_linear: Vec<f64>,
}

/// A sparse matrix by columns: column k's (row, weight) pairs are `rows[start[k]..start[k + 1]]`; `cols` repeats
/// each entry's column, so a product can run over the entries in one flat loop.
#[derive(Clone, Debug, Default)]
struct Columns {
    start: Vec<usize>,
    rows: Vec<usize>,
    cols: Vec<usize>,
    weights: Vec<f64>,
    /// One more than the largest row.
    rows_needed: usize,
}

/// `recover` as one flat list: linear node `a` (over all clusters) is `base[a] - sum weight * volts[from]` over
/// its terms `start[a]..start[a + 1]`, written to `volts[slot[a]]`. Weights are negated, sized at set-up.
#[derive(Clone, Debug, Default)]
struct Recovery {
    slot: Vec<usize>,
    start: Vec<usize>,
    from: Vec<usize>,
    weight: Vec<f64>,
    /// One more than the largest slot read or written.
    slots_needed: usize,
}

impl Condensation {
    /// Split `size` nodes into the `kept` ones and linear clusters, connected as `links` says (pairs of nodes
    /// joined by a linear part, either order); `caps` are the capacitors' terminals, whose history currents
    /// `given` maps straight to the kept nodes.
    pub fn new(
        size: usize,
        kept: &[bool],
        links: &[(usize, usize)],
        caps: &[[Option<usize>; 2]],
    ) -> Condensation {
        let device: Vec<usize> = (0..size).filter(|&i| kept[i]).collect();
        let mut reduced_of = vec![None; size];
        for (r, &i) in device.iter().enumerate() {
            reduced_of[i] = Some(r);
        }
        // Connected components of the linear nodes, found by joining each link between two of them.
        let mut root: Vec<usize> = (0..size).collect();
        fn find(root: &mut [usize], mut i: usize) -> usize {
            while root[i] != i {
                root[i] = root[root[i]];
                i = root[i];
            }
            i
        }
        for &(a, b) in links {
            if !kept[a] && !kept[b] {
                let (ra, rb) = (find(&mut root, a), find(&mut root, b));
                root[ra] = rb;
            }
        }
        let mut clusters: Vec<Cluster> = Vec::new();
        let mut which: Vec<Option<usize>> = vec![None; size];
        for i in (0..size).filter(|&i| !kept[i]) {
            let r = find(&mut root, i);
            let c = match which[r] {
                Some(c) => c,
                None => {
                    clusters.push(Cluster {
                        nodes: Vec::new(),
                        neighbours: Vec::new(),
                        neighbours_reduced: Vec::new(),
                        inverse: Vec::new(),
                        recover: Vec::new(),
                        feed: Vec::new(),
                        work: Vec::new(),
                        offset: 0,
                    });
                    which[r] = Some(clusters.len() - 1);
                    clusters.len() - 1
                }
            };
            clusters[c].nodes.push(i);
        }
        for &(a, b) in links {
            for (linear, other) in [(a, b), (b, a)] {
                if !kept[linear] && kept[other] {
                    let c = which[find(&mut root, linear)].expect("clustered");
                    if !clusters[c].neighbours.contains(&other) {
                        clusters[c].neighbours.push(other);
                    }
                }
            }
        }
        let mut offset = 0;
        for c in clusters.iter_mut() {
            c.neighbours.sort_unstable();
            c.neighbours_reduced = c
                .neighbours
                .iter()
                .map(|&i| reduced_of[i].expect("kept"))
                .collect();
            let (k, nb) = (c.nodes.len(), c.neighbours.len());
            c.inverse = vec![0.0; k * k];
            c.work = vec![0.0; k * k];
            c.recover = vec![0.0; k * nb];
            c.feed = vec![0.0; nb * k];
            c.offset = offset;
            offset += k;
        }
        let linear_count = offset;
        let mut c = Condensation {
            size,
            device,
            reduced_of,
            clusters,
            linear_count,
            caps: caps.to_vec(),
            cap_to_kept: Columns::default(),
            cap_to_linear: Columns::default(),
            recovery: Recovery::default(),
            rails_kept: Vec::new(),
            rails_linear: vec![0.0; linear_count],
            jack_kept: Vec::new(),
            jack_linear: vec![0.0; linear_count],
        };
        c.rails_kept = vec![0.0; c.device.len()];
        c.jack_kept = vec![0.0; c.device.len()];
        // The pattern of each capacitor's columns: a terminal on a kept node reaches that node; one on a linear
        // node reaches its cluster's neighbours (kept) and its cluster's nodes (linear).
        let cluster_of = |node: usize, clusters: &[Cluster]| {
            clusters.iter().position(|c| c.nodes.contains(&node))
        };
        for (index, cap) in caps.iter().enumerate() {
            c.cap_to_kept.start.push(c.cap_to_kept.rows.len());
            c.cap_to_linear.start.push(c.cap_to_linear.rows.len());
            let mut kept_rows: Vec<usize> = Vec::new();
            let mut linear_rows: Vec<usize> = Vec::new();
            for node in cap.iter().flatten() {
                if let Some(r) = c.reduced_of[*node] {
                    kept_rows.push(r);
                } else if let Some(k) = cluster_of(*node, &c.clusters) {
                    kept_rows.extend(&c.clusters[k].neighbours_reduced);
                    let cl = &c.clusters[k];
                    linear_rows.extend(cl.offset..cl.offset + cl.nodes.len());
                }
            }
            kept_rows.sort_unstable();
            kept_rows.dedup();
            linear_rows.sort_unstable();
            linear_rows.dedup();
            c.cap_to_kept.weights.extend(kept_rows.iter().map(|_| 0.0));
            c.cap_to_kept.cols.extend(kept_rows.iter().map(|_| index));
            c.cap_to_kept.rows.extend(kept_rows);
            c.cap_to_linear
                .weights
                .extend(linear_rows.iter().map(|_| 0.0));
            c.cap_to_linear
                .cols
                .extend(linear_rows.iter().map(|_| index));
            c.cap_to_linear.rows.extend(linear_rows);
        }
        c.cap_to_kept.start.push(c.cap_to_kept.rows.len());
        c.cap_to_linear.start.push(c.cap_to_linear.rows.len());
        for columns in [&mut c.cap_to_kept, &mut c.cap_to_linear] {
            columns.rows_needed = columns.rows.iter().max().map_or(0, |r| r + 1);
        }
        // The recovery's shape: every linear node reads every neighbour of its cluster.
        let r = &mut c.recovery;
        for cl in &c.clusters {
            for _ in &cl.nodes {
                r.start.push(r.from.len());
                r.slot.push(0);
                r.from.extend(cl.neighbours.iter().map(|_| 0));
            }
        }
        r.start.push(r.from.len());
        r.weight = vec![0.0; r.from.len()];
        c
    }

    /// Kept unknowns.
    pub fn kept(&self) -> usize {
        self.device.len()
    }

    /// Linear nodes in all (the length of the scratch `reduce_given` needs).
    pub fn linear_count(&self) -> usize {
        self.linear_count
    }

    /// Pairs of kept nodes (reduced indices) that elimination joins: every two neighbours of a cluster.
    pub fn fill(&self) -> Vec<(usize, usize)> {
        let mut out = Vec::new();
        for c in &self.clusters {
            for &a in &c.neighbours_reduced {
                for &b in &c.neighbours_reduced {
                    out.push((a, b));
                }
            }
        }
        out
    }

    /// From the full conductance matrix `g` (size x size, row-major), compute each cluster's matrices and
    /// write the reduced matrix (kept x kept, row-major) into `reduced`. No allocation. Returns false when a
    /// cluster's matrix is singular (a node with no DC path).
    pub fn reduce_matrix(&mut self, g: &[f64], reduced: &mut [f64]) -> bool {
        let n = self.size;
        let m = self.device.len();
        for (r, &i) in self.device.iter().enumerate() {
            for (s, &j) in self.device.iter().enumerate() {
                reduced[r * m + s] = g[i * n + j];
            }
        }
        let mut ok = true;
        for c in self.clusters.iter_mut() {
            let k = c.nodes.len();
            let nb = c.neighbours.len();
            for (a, &i) in c.nodes.iter().enumerate() {
                for (b, &j) in c.nodes.iter().enumerate() {
                    c.work[a * k + b] = g[i * n + j];
                }
            }
            ok &= invert(&mut c.work, &mut c.inverse, k);
            // recover = G_cc^-1 G_cD; feed = G_Dc G_cc^-1.
            for a in 0..k {
                for (q, &j) in c.neighbours.iter().enumerate() {
                    let mut sum = 0.0;
                    for b in 0..k {
                        sum += c.inverse[a * k + b] * g[c.nodes[b] * n + j];
                    }
                    c.recover[a * nb + q] = sum;
                    self.recovery.weight[self.recovery.start[c.offset + a] + q] = -sum;
                }
            }
            for (p, &i) in c.neighbours.iter().enumerate() {
                for b in 0..k {
                    let mut sum = 0.0;
                    for a in 0..k {
                        sum += g[i * n + c.nodes[a]] * c.inverse[a * k + b];
                    }
                    c.feed[p * k + b] = sum;
                }
            }
            // Schur complement: G_DD - G_Dc G_cc^-1 G_cD on the neighbours.
            for (p, &rp) in c.neighbours_reduced.iter().enumerate() {
                for (q, &rq) in c.neighbours_reduced.iter().enumerate() {
                    let mut sum = 0.0;
                    for a in 0..k {
                        sum += g[c.neighbours[p] * n + c.nodes[a]] * c.recover[a * nb + q];
                    }
                    reduced[rp * m + rq] -= sum;
                }
            }
        }
        ok
    }

    /// After `reduce_matrix`: how the rails (`rails`, given currents per node), the jack (`jack`, conductance
    /// per node to it) and each capacitor's history current reach the kept nodes and the clusters. No
    /// allocation beyond the scratch `full` (size + 1 long).
    pub fn prepare_sources(&mut self, rails: &[f64], jack: &[f64], full: &mut [f64]) {
        let (mut kept, mut linear) = (
            std::mem::take(&mut self.rails_kept),
            std::mem::take(&mut self.rails_linear),
        );
        self.reduce_given(&rails[..self.size], &mut kept, &mut linear);
        self.rails_kept = kept;
        self.rails_linear = linear;
        let (mut kept, mut linear) = (
            std::mem::take(&mut self.jack_kept),
            std::mem::take(&mut self.jack_linear),
        );
        self.reduce_given(&jack[..self.size], &mut kept, &mut linear);
        self.jack_kept = kept;
        self.jack_linear = linear;
        // Each capacitor's columns: its unit history current (+1 into a, -1 into b) through the elimination.
        for k in 0..self.caps.len() {
            full[..self.size].iter_mut().for_each(|v| *v = 0.0);
            let [a, b] = self.caps[k];
            if let Some(a) = a {
                full[a] += 1.0;
            }
            if let Some(b) = b {
                full[b] -= 1.0;
            }
            let (from, to) = (self.cap_to_kept.start[k], self.cap_to_kept.start[k + 1]);
            for e in from..to {
                let r = self.cap_to_kept.rows[e];
                let mut w = full[self.device[r]];
                for c in &self.clusters {
                    if let Some(p) = c.neighbours_reduced.iter().position(|&x| x == r) {
                        for (b, &j) in c.nodes.iter().enumerate() {
                            w -= c.feed[p * c.nodes.len() + b] * full[j];
                        }
                    }
                }
                self.cap_to_kept.weights[e] = w;
            }
            let (from, to) = (self.cap_to_linear.start[k], self.cap_to_linear.start[k + 1]);
            for e in from..to {
                let row = self.cap_to_linear.rows[e];
                let c = self
                    .clusters
                    .iter()
                    .find(|c| (c.offset..c.offset + c.nodes.len()).contains(&row))
                    .expect("row of a cluster");
                let (a, k) = (row - c.offset, c.nodes.len());
                let mut w = 0.0;
                for (b, &j) in c.nodes.iter().enumerate() {
                    w += c.inverse[a * k + b] * full[j];
                }
                self.cap_to_linear.weights[e] = w;
            }
        }
    }

    /// This sample's given currents of the kept nodes (`kept`) and G_cc^-1 h_c of the clusters (`linear`), from
    /// the jack's voltage and the capacitors' history currents.
    #[inline(always)]
    pub fn given<L: Lane>(&self, jack: L, history: &[L], kept: &mut [L], linear: &mut [L]) {
        for ((out, rail), per_volt) in kept.iter_mut().zip(&self.rails_kept).zip(&self.jack_kept) {
            *out = L::splat(*per_volt).madd(jack, L::splat(*rail));
        }
        for ((out, rail), per_volt) in linear
            .iter_mut()
            .zip(&self.rails_linear)
            .zip(&self.jack_linear)
        {
            *out = L::splat(*per_volt).madd(jack, L::splat(*rail));
        }
        for (out, columns) in [(kept, &self.cap_to_kept), (linear, &self.cap_to_linear)] {
            // Checked once here: every entry's row is below the output's length and its column below the
            // number of capacitors (both fixed in `new`).
            assert!(out.len() >= columns.rows_needed && history.len() >= self.caps.len());
            for ((r, k), w) in columns.rows.iter().zip(&columns.cols).zip(&columns.weights) {
                // SAFETY: r < rows_needed <= out.len() and k < caps.len() <= history.len(), as asserted.
                unsafe {
                    let o = out.get_unchecked_mut(*r);
                    *o = L::splat(*w).madd(*history.get_unchecked(*k), *o);
                }
            }
        }
    }

    /// The kept nodes' given currents, `reduced[r] = full[device[r]] - G_Dc G_cc^-1 h_c`, and G_cc^-1 h_c of each
    /// cluster into `scratch` (for `recover`).
    #[inline(always)]
    pub fn reduce_given<L: Lane>(&self, full: &[L], reduced: &mut [L], scratch: &mut [L]) {
        debug_assert!(full.len() >= self.size);
        for (r, &i) in self.device.iter().enumerate() {
            reduced[r] = full[i];
        }
        for c in &self.clusters {
            let k = c.nodes.len();
            for (a, out) in scratch[c.offset..c.offset + k].iter_mut().enumerate() {
                let mut sum = L::default();
                for (b, &j) in c.nodes.iter().enumerate() {
                    sum = L::splat(c.inverse[a * k + b]).madd(full[j], sum);
                }
                *out = sum;
            }
            for (p, &rp) in c.neighbours_reduced.iter().enumerate() {
                let mut sum = reduced[rp];
                for b in 0..k {
                    sum = (-L::splat(c.feed[p * k + b])).madd(full[c.nodes[b]], sum);
                }
                reduced[rp] = sum;
            }
        }
    }

    /// Where each node's voltage sits in the vector `recover` writes (`slots[node]`).
    pub fn set_slots(&mut self, slots: &[usize]) {
        let r = &mut self.recovery;
        for c in &self.clusters {
            for (a, &node) in c.nodes.iter().enumerate() {
                let at = r.start[c.offset + a];
                r.slot[c.offset + a] = slots[node];
                for (from, &neighbour) in r.from[at..].iter_mut().zip(&c.neighbours) {
                    *from = slots[neighbour];
                }
            }
        }
        r.slots_needed = r.slot.iter().chain(&r.from).max().map_or(0, |s| s + 1);
    }

    /// The linear nodes' voltages from the kept ones: v_c = G_cc^-1 h_c - G_cc^-1 G_cD v_D, with `scratch` from
    /// `given`, in the slots `set_slots` gave.
    #[inline(always)]
    pub fn recover<L: Lane>(&self, scratch: &[L], volts: &mut [L]) {
        let r = &self.recovery;
        // Checked once here: every slot read or written lies below `volts`'s length (`set_slots` fixed them).
        assert!(volts.len() >= r.slots_needed);
        for ((&slot, base), span) in r.slot.iter().zip(scratch).zip(r.start.windows(2)) {
            let mut v = *base;
            for (&from, &w) in r.from[span[0]..span[1]]
                .iter()
                .zip(&r.weight[span[0]..span[1]])
            {
                // SAFETY: from < slots_needed <= volts.len(), as asserted.
                v = L::splat(w).madd(unsafe { *volts.get_unchecked(from) }, v);
            }
            // SAFETY: slot < slots_needed <= volts.len(), as asserted.
            unsafe { *volts.get_unchecked_mut(slot) = v };
        }
    }
}

/// The inverse of the k x k matrix `a` (spoilt) into `inverse`, by Gauss-Jordan elimination with partial
/// pivoting; false when a pivot is not clearly nonzero.
fn invert(a: &mut [f64], inverse: &mut [f64], k: usize) -> bool {
    for i in 0..k {
        for j in 0..k {
            inverse[i * k + j] = if i == j { 1.0 } else { 0.0 };
        }
    }
    let mut ok = true;
    for col in 0..k {
        let mut pivot = col;
        for row in col + 1..k {
            if a[row * k + col].abs() > a[pivot * k + col].abs() {
                pivot = row;
            }
        }
        if pivot != col {
            for j in 0..k {
                a.swap(col * k + j, pivot * k + j);
                inverse.swap(col * k + j, pivot * k + j);
            }
        }
        let d = a[col * k + col];
        if d.abs() < 1e-300 {
            ok = false;
            continue;
        }
        let inv = 1.0 / d;
        for j in 0..k {
            a[col * k + j] *= inv;
            inverse[col * k + j] *= inv;
        }
        for row in 0..k {
            if row != col {
                let f = a[row * k + col];
                if f != 0.0 {
                    for j in 0..k {
                        a[row * k + j] -= f * a[col * k + j];
                        inverse[row * k + j] -= f * inverse[col * k + j];
                    }
                }
            }
        }
    }
    ok
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::band::dense_solve;

    /// Eliminating the linear clusters and solving the kept nodes, then recovering the rest, gives the solution
    /// of the whole system by dense Gaussian elimination (a general method).
    #[test]
    fn condensed_solve_equals_the_whole_solve() {
        // A chain of 8 nodes; 0, 3 and 6 kept, the others in clusters {1, 2}, {4, 5}, {7}.
        let n = 8;
        let links = [
            (0, 1),
            (1, 2),
            (2, 3),
            (3, 4),
            (4, 5),
            (5, 6),
            (6, 7),
            (1, 3),
            (4, 6),
        ];
        let kept = [true, false, false, true, false, false, true, false];
        let mut g = vec![0.0; n * n];
        let mut add = |a: usize, b: usize, v: f64| {
            g[a * n + a] += v;
            g[b * n + b] += v;
            g[a * n + b] -= v;
            g[b * n + a] -= v;
        };
        for (k, &(a, b)) in links.iter().enumerate() {
            add(a, b, 1.0 + k as f64 * 0.37);
        }
        for i in 0..n {
            g[i * n + i] += 0.1 * (i + 1) as f64;
        }
        let h: Vec<f64> = (0..n).map(|i| (i as f64 * 1.7).sin()).collect();
        let mut c = Condensation::new(n, &kept, &links, &[]);
        let m = c.kept();
        let mut reduced = vec![0.0; m * m];
        assert!(c.reduce_matrix(&g, &mut reduced));
        let mut hr = vec![0.0; m];
        let mut scratch = vec![0.0; c.linear_count()];
        c.reduce_given(&h, &mut hr, &mut scratch);
        dense_solve(&mut reduced, &mut hr, m);
        let mut volts = vec![0.0; n];
        for (r, &i) in c.device.iter().enumerate() {
            volts[i] = hr[r];
        }
        c.set_slots(&(0..n).collect::<Vec<_>>());
        c.recover(&scratch, &mut volts);
        let (mut whole, mut x) = (g.clone(), h.clone());
        dense_solve(&mut whole, &mut x, n);
        for i in 0..n {
            assert!(
                (volts[i] - x[i]).abs() < 1e-12,
                "node {i}: {} vs {}",
                volts[i],
                x[i]
            );
        }
    }
}
