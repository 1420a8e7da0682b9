//! Level-0 links of the flat copy made harder to strand a node than the
//! library left them ([`strengthen`]).
//!
//! An HNSW build prunes each neighbour list with the diversity heuristic
//! (Malkov & Yashunin 2018, arXiv:1603.09320, algorithm 4), so a node can be
//! left in no other node's list: no search reaches it. Near-duplicate
//! captions make this common (a twin is pruned from the lists its twin
//! already covers), and queries from the other modality (an image's vector,
//! far from every caption) feel it most. Measured on the blocks probe bank
//! (`tests/integration/bank.rs`), usearch's graph alone gives recall@10
//! 0.951 for the probe images; with these links, 0.998.
//!
//! The copy's records have room for `2 * M` links, and heuristic lists seldom
//! fill it, so two passes add links at no memory cost:
//! 1. reverse links: for each link `a -> b` of the library's graph, `b -> a`
//!    when `b` has room and lacks it (as hnswlib and usearch try while they
//!    build, but without pruning them again);
//! 2. for each node still in nobody's list, the most similar of its own
//!    neighbours whose list is full gives up its least similar link whose
//!    target is in another list too, and takes this node instead.

use crate::bank::distance::dot;

/// What [`strengthen`] changed.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct LinkReport {
    /// Links in the library's level 0.
    pub library: usize,
    /// Reverse links added in free places.
    pub reverse: usize,
    /// Nodes in nobody's list after the reverse links (the entry aside).
    pub stranded: usize,
    /// Of those, how many a neighbour's list took in.
    pub rejoined: usize,
}

/// Level-0 records as `FlatGraph` lays them out: `record` words each, the
/// vector's `dim` words first, then the count and up to `most` links.
struct Records<'a> {
    words: &'a mut [u32],
    record: usize,
    dim: usize,
    most: usize,
}

impl Records<'_> {
    fn nodes(&self) -> usize {
        self.words.len() / self.record
    }

    fn links(&self, node: usize) -> &[u32] {
        let start = node * self.record + self.dim;
        let count = self.words[start] as usize;
        &self.words[start + 1..start + 1 + count]
    }

    fn push(&mut self, node: usize, to: u32) -> bool {
        let start = node * self.record + self.dim;
        let count = self.words[start] as usize;
        if count >= self.most || self.links(node).contains(&to) {
            return false;
        }
        self.words[start + 1 + count] = to;
        self.words[start] += 1;
        true
    }

    fn replace(&mut self, node: usize, slot: usize, to: u32) {
        self.words[node * self.record + self.dim + 1 + slot] = to;
    }

    fn similarity(&self, a: usize, b: usize) -> f32 {
        let v = |n: usize| {
            let w = &self.words[n * self.record..n * self.record + self.dim];
            // SAFETY: the words were written from f32 bits; same size and
            // alignment, every bit pattern a valid f32.
            unsafe { std::slice::from_raw_parts(w.as_ptr().cast::<f32>(), w.len()) }
        };
        dot(v(a), v(b))
    }
}

/// Adds reverse links and rejoins stranded nodes (module docs) in the
/// level-0 array `words` of `record`-word records. Node 0 is the entry point
/// and needs no incoming link.
pub(super) fn strengthen(words: &mut [u32], record: usize, dim: usize, most: usize) -> LinkReport {
    let mut r = Records {
        words,
        record,
        dim,
        most,
    };
    let nodes = r.nodes();
    let library: Vec<Vec<u32>> = (0..nodes).map(|n| r.links(n).to_vec()).collect();
    let mut report = LinkReport {
        library: library.iter().map(Vec::len).sum(),
        ..Default::default()
    };
    for (a, links) in library.iter().enumerate() {
        for &b in links {
            report.reverse += usize::from(r.push(b as usize, a as u32));
        }
    }
    let mut incoming = vec![0u32; nodes];
    for n in 0..nodes {
        for &b in r.links(n) {
            incoming[b as usize] += 1;
        }
    }
    for x in 1..nodes {
        if incoming[x] > 0 {
            continue;
        }
        report.stranded += 1;
        // Its neighbours, most similar first; with the reverse links done,
        // each of their lists is full.
        let mut hosts: Vec<(f32, usize)> = library[x]
            .iter()
            .map(|&b| (r.similarity(x, b as usize), b as usize))
            .collect();
        hosts.sort_by(|p, q| q.0.total_cmp(&p.0));
        for (_, host) in hosts {
            let given_up = r
                .links(host)
                .iter()
                .enumerate()
                .filter(|(_, &w)| incoming[w as usize] > 1)
                .map(|(slot, &w)| (r.similarity(host, w as usize), slot, w))
                .min_by(|p, q| p.0.total_cmp(&q.0));
            if let Some((_, slot, w)) = given_up {
                r.replace(host, slot, x as u32);
                incoming[w as usize] -= 1;
                incoming[x] += 1;
                report.rejoined += 1;
                break;
            }
        }
    }
    report
}

#[cfg(test)]
mod tests {
    use super::*;

    const DIM: usize = 2;
    const MOST: usize = 2;
    /// Two vector words, the count, two links: rounded to a whole record.
    const RECORD: usize = 5;

    /// Records for unit vectors at `degrees` with the given links.
    fn records(nodes: &[(f32, &[u32])]) -> Vec<u32> {
        let mut words = vec![0u32; nodes.len() * RECORD];
        for (n, (deg, links)) in nodes.iter().enumerate() {
            let r = &mut words[n * RECORD..(n + 1) * RECORD];
            r[0] = deg.to_radians().cos().to_bits();
            r[1] = deg.to_radians().sin().to_bits();
            r[2] = links.len() as u32;
            r[3..3 + links.len()].copy_from_slice(links);
        }
        words
    }

    fn links_of(words: &[u32], node: usize) -> Vec<u32> {
        let r = &words[node * RECORD..(node + 1) * RECORD];
        r[3..3 + r[2] as usize].to_vec()
    }

    #[test]
    fn reverse_links_fill_free_places_once() {
        // 0 -> 1 and 1 -> 0 already; 2 -> 1 has no way back; 1 has room.
        let mut words = records(&[(0.0, &[1]), (10.0, &[0]), (20.0, &[1])]);
        let report = strengthen(&mut words, RECORD, DIM, MOST);
        assert_eq!(links_of(&words, 1), vec![0, 2]);
        assert_eq!(links_of(&words, 0), vec![1], "no repeated link");
        assert_eq!(
            report,
            LinkReport {
                library: 3,
                reverse: 1,
                stranded: 0,
                rejoined: 0
            }
        );
    }

    #[test]
    fn a_stranded_node_takes_the_least_similar_link_of_its_nearest_full_neighbour() {
        // Node 3 (at 40 degrees) links to 1 and 2, both full, and is in no
        // list. Node 2 (30 degrees) is its most similar neighbour; of 2's
        // links, 0 (at 0 degrees) is the least similar to 2 and is also in
        // 1's list, so 2 gives up 0 for 3.
        let mut words = records(&[
            (0.0, &[1, 2]),
            (10.0, &[0, 2]),
            (30.0, &[0, 1]),
            (40.0, &[1, 2]),
        ]);
        let report = strengthen(&mut words, RECORD, DIM, MOST);
        assert_eq!(links_of(&words, 2), vec![3, 1]);
        assert_eq!(report.stranded, 1);
        assert_eq!(report.rejoined, 1);
        let reached: std::collections::HashSet<u32> =
            (0..4).flat_map(|n| links_of(&words, n)).collect();
        assert!(reached.contains(&3), "node 3 can be reached");
    }

    #[test]
    fn a_link_that_is_some_node_s_only_way_in_is_kept() {
        // 3 is stranded; its one neighbour 1 is full with 0 and 2. 2 is the
        // less similar to 1 but is in no other list, so 1 gives up 0 (also
        // in 2's and 4's lists) instead.
        let mut words = records(&[
            (0.0, &[1, 4]),
            (10.0, &[0, 2]),
            (50.0, &[0, 1]),
            (15.0, &[1]),
            (5.0, &[0, 1]),
        ]);
        let report = strengthen(&mut words, RECORD, DIM, MOST);
        assert_eq!(links_of(&words, 1), vec![3, 2]);
        assert_eq!(
            (report.reverse, report.stranded, report.rejoined),
            (0, 1, 1)
        );
        // When each of the neighbour's links is some node's only way in,
        // the stranded node stays so, and is counted.
        let mut words = records(&[(0.0, &[1]), (10.0, &[2, 0]), (20.0, &[1]), (5.0, &[1])]);
        let report = strengthen(&mut words, RECORD, DIM, MOST);
        assert_eq!(links_of(&words, 1), vec![2, 0]);
        assert_eq!((report.stranded, report.rejoined), (1, 0));
    }
}
