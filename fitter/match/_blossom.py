"""Maximum-weight matching in a general graph: Edmonds' primal-dual blossom method.

This is the engine behind :func:`fitter.match.match_pairs`.  It keeps the LP duals
of the matching polytope (J. Edmonds, "Maximum matching and a polyhedron with
0,1-vertices", J. Res. Nat. Bur. Standards 69B (1965) 125-130):

    minimise  sum_v y_v + sum_B z_B (|B| - 1) / 2
    subject to  y_u + y_v + sum_{B containing u and v} z_B >= w_uv,   y, z >= 0,

and a matching that satisfies complementary slackness with them at every step:
matched edges are *tight* (slack 0), a blossom B with z_B > 0 holds (|B| - 1) / 2
matched edges, and an unmatched vertex ends with y_v = 0.  When every vertex is
matched or has y_v = 0, the matching and the duals prove each other optimal.

All unmatched vertices with y > 0 grow alternating trees at once under one running
dual change (Edmonds' method as in Z. Galil, "Efficient algorithms for finding
maximum matching in graphs", ACM Comput. Surv. 18 (1986) 23-38, with the several
trees of V. Kolmogorov, "Blossom V: a new implementation of a minimum cost perfect
matching algorithm", Math. Prog. Comp. 1 (2009) 43-67; both cited from memory).
Dual changes are kept lazily, per top-level blossom, and the next event (an edge
becoming tight, an inner blossom's z reaching 0, an outer vertex's y reaching 0)
comes from a heap, so the work follows the trees, not the graph.  A new blossom takes
over the id of its largest child and an expanding one hands its id to its largest
child, so blossoms nested hundreds deep (usual for units spread along a line) cost
in proportion to what changes.  The matching may start from any set of tight edges
and any feasible duals: by default a greedy matching on ``y_v = max_e w_e / 2``
lowered vertex by vertex; after a solve, :meth:`BlossomMatching.restart_with` adds
edges and continues.

When an outer vertex other than the root reaches y = 0, the even alternating path
from the root to it is flipped: the root is matched and that vertex left single
with y = 0, which complementary slackness allows.  The inner vertices of such a tree
are recorded (``barrier``): they separate its outer blossoms from the rest.

Nothing here is specific to tubes; the tests check it against brute force and
against networkx's ``max_weight_matching`` (an independent implementation, of
Galil's O(n^3) form).
"""

from __future__ import annotations

import heapq
import time

import numpy as np

FREE, OUTER, INNER = 0, 1, 2


class BlossomMatching:
    """Maximum-weight matching of an undirected graph with float weights.

    Parameters
    ----------
    n : int
        Number of vertices.
    I, J : array of int
        Edge end points (each undirected edge once, I != J).
    W : array of float
        Edge weights (> 0).
    tol : float
        Slack below which an edge counts as tight (absolute, in weight units).
    """

    def __init__(self, n, I, J, W, tol=None):
        self.n = n
        I = np.asarray(I, np.int64)
        J = np.asarray(J, np.int64)
        W = np.asarray(W, float)
        self.tol = float(tol) if tol is not None else 1e-10 * max(1.0, float(np.max(W, initial=1.0)))
        self.y = [0.0] * n
        self.mate = [-1] * n
        # blossoms get ids n, n+1, ...; vertices are their own trivial blossoms
        self.parent = [-1] * n
        self.childs: list = [None] * n
        self.bedges: list = [None] * n
        self.base = list(range(n))
        self.z = [0.0] * n
        self.inb = list(range(n))
        self.label = [FREE] * n
        self.labeledge: list = [None] * n
        self.tj = [0.0] * n
        self.yoff = [0.0] * n  # dual offset shared by the leaves of a top-level blossom
        self.size = [1] * n
        self.troot = [-1] * n
        self.park: list = [None] * n  # edges from outer vertices waiting on an inner blossom
        self._free_ids: list = []
        self.host_min = 4
        self.barrier: set = set()  # inner vertices of trees that ended without augmenting
        self.stats = {"searches": 0, "augment": 0, "single": 0, "shrink": 0, "expand": 0, "grow": 0}
        self.adj: list = [[] for _ in range(n)]
        self.add_edges(I, J, W)

    # ------------------------------------------------------------------ graph
    def add_edges(self, I, J, W):
        adj = self.adj
        for u, v, w in zip(np.asarray(I).tolist(), np.asarray(J).tolist(), np.asarray(W, float).tolist()):
            adj[u].append((v, w))
            adj[v].append((u, w))

    # ------------------------------------------------------------------ start
    def greedy_start(self, late=()):
        """Feasible duals and a greedy matching of tight edges.

        ``y_v = max_e w_e / 2``, then each vertex in turn lowers its y until its best edge
        is tight and takes that edge if the other end is single.  Vertices in ``late``
        (hubs such as the stand-ins for a single unit) get the smallest y that keeps
        their edges feasible once the others are set, and go last.
        """
        y, adj = self.y, self.adj
        late = set(late)
        for v in range(self.n):
            if v not in late:
                y[v] = max((w for u, w in adj[v] if u not in late), default=0.0) / 2.0
        for v in late:
            y[v] = max((w - y[u] for u, w in adj[v]), default=0.0)
            y[v] = max(y[v], 0.0)
        self._greedy_pass([v for v in range(self.n) if v not in late] + sorted(late))

    def _greedy_pass(self, order):
        """Each single vertex in turn lowers its y until its best edge is tight (never below
        0; this keeps every edge feasible) and takes that edge if the other end is single.
        Needs every vertex to be its own top-level blossom or the offsets folded in."""
        y, mate, adj = self.y, self.mate, self.adj
        for v in order:
            if mate[v] >= 0:
                continue
            if not adj[v]:
                y[v] = 0.0
                continue
            best, bw = None, None
            yv = y[v]
            for u, w in adj[v]:
                s = yv + y[u] - w
                if best is None or s < bw or (s == bw and mate[u] < 0 and mate[best] >= 0):
                    best, bw = u, s
            drop = min(bw, yv)
            y[v] = yv - drop
            if drop == bw and mate[best] < 0:
                mate[v], mate[best] = best, v

    # ------------------------------------------------------------ blossoms
    def leaves(self, b):
        if b < self.n:
            return [b]
        out, stack = [], [b]
        childs, n = self.childs, self.n
        while stack:
            c = stack.pop()
            if c < n:
                out.append(c)
            else:
                stack.extend(childs[c])
        return out

    def _new_id(self):
        if self._free_ids:
            return self._free_ids.pop()
        for a in (self.parent, self.troot):
            a.append(-1)
        for a in (self.childs, self.bedges, self.labeledge, self.park):
            a.append(None)
        for a in (self.z, self.tj, self.yoff):
            a.append(0.0)
        self.base.append(-1)
        self.label.append(FREE)
        self.size.append(0)
        return len(self.parent) - 1

    def _augment_blossom(self, b, v):
        """Re-match inside blossom b so that its leaf v becomes the base (iterative).

        The blossoms between v and b are found once, walking up from v, and re-matched
        from the outside in; each sibling sub-blossom passed on the way is a task of its
        own (its new base is the end of the edge that now matches it)."""
        parent, childs, bedges, mate, n, base = self.parent, self.childs, self.bedges, self.mate, self.n, self.base
        tasks = [(b, v)]
        while tasks:
            top, v = tasks.pop()
            chain = []
            t = v
            while t != top:
                chain.append(t)
                t = parent[t]
            b = top
            for idx in range(len(chain) - 1, -1, -1):
                t = chain[idx]  # the child of b holding v
                ch, ed = childs[b], bedges[b]
                k = len(ch)
                i = ch.index(t)
                j = i
                if i & 1:  # forward to index k (== 0)
                    while j != k:
                        a, bb = ch[(j + 1) % k], ch[(j + 2) % k]
                        x, w = ed[(j + 1) % k]
                        if a >= n:
                            tasks.append((a, x))
                        if bb >= n:
                            tasks.append((bb, w))
                        mate[x], mate[w] = w, x
                        j += 2
                else:  # backward to index 0
                    while j != 0:
                        a, bb = ch[j - 1], ch[j - 2]
                        x, w = ed[j - 2]  # x in ch[j-2], w in ch[j-1]
                        if a >= n:
                            tasks.append((a, w))
                        if bb >= n:
                            tasks.append((bb, x))
                        mate[x], mate[w] = w, x
                        j -= 2
                if i:
                    childs[b] = ch[i:] + ch[:i]
                    bedges[b] = ed[i:] + ed[:i]
                base[b] = v
                b = t

    def _move(self, src, dst):
        """Give blossom ``src``'s children, edges, base, z and size to the id ``dst``."""
        for a in (self.childs, self.bedges, self.base, self.z, self.size):
            a[dst] = a[src]
        for c in self.childs[dst]:
            self.parent[c] = dst

    # -------------------------------------------------------------- solving
    def solve(self, deadline=None):
        """Grow alternating trees from every unmatched vertex with y > 0 until none is left.

        ``deadline`` (a ``time.perf_counter()`` value): raise TimeoutError when passed; the
        matching is then valid but not optimal, and the duals are not to be used.
        """
        roots = [v for v in range(self.n) if self.mate[v] < 0 and self.y[v] + self.yoff[self.inb[v]] > self.tol
                 and self.adj[v]]
        if roots:
            self._grow(roots, deadline)
        return self

    def restart_with(self, I, J, W, lift=None):
        """Add edges after a solve and make the state a valid start again.

        The blossoms are flattened into the vertex duals (each leaf takes half of every
        z around it, which keeps every edge feasible), a new edge still short of
        feasibility lifts one end's y, and matched edges that are no longer tight are
        dropped.  :meth:`solve` then grows from the vertices left single.  ``lift``:
        the half-z sums per vertex, if the caller has them already.
        """
        n = self.n
        if lift is None:
            lift = np.zeros(n)
            for leaves, zb in self.blossoms():
                lift[leaves] += zb / 2.0
        y = (self.duals() + np.asarray(lift, float)).tolist()
        del self.parent[n:], self.childs[n:], self.bedges[n:], self.base[n:], self.z[n:], self.label[n:]
        del self.labeledge[n:], self.tj[n:], self.yoff[n:], self.size[n:], self.troot[n:], self.park[n:]
        self.parent[:] = [-1] * n
        self.inb[:] = list(range(n))
        self.base[:] = list(range(n))
        self.yoff[:] = [0.0] * n
        self._free_ids = []
        self.y = y
        self.add_edges(I, J, W)
        for u, v, w in zip(np.asarray(I).tolist(), np.asarray(J).tolist(), np.asarray(W, float).tolist()):
            short = w - y[u] - y[v]
            if short > 0:
                y[u] += short
        mate, adj, tol = self.mate, self.adj, self.tol
        for v in range(n):
            u = mate[v]
            if u > v:
                w = max(w for x, w in adj[v] if x == u)
                if y[u] + y[v] - w > tol:
                    mate[u] = mate[v] = -1
        # most of the vertices just set free take their old partner straight back
        self._greedy_pass([v for v in range(n) if mate[v] < 0])

    def _grow(self, roots, deadline=None):
        """All trees grow at once under one running dual change D (Edmonds' primal-dual method).

        The dual of vertex v is ``y[v] + yoff[b]`` plus the change since blossom b (v's
        top-level blossom) took its label at ``tj[b]``: minus ``D - tj[b]`` when b is
        outer, plus when inner (b's z moves by twice that, the other way).  Events come
        from a heap keyed by the value of D at which they happen; each entry is checked
        against the present duals when it comes off the heap.

        Blossom operations cost in proportion to the blossoms that change, not to the
        largest one: a new blossom takes over the id (and so the leaves' ``inb`` and
        offset) of its largest outer child, and an expanding blossom hands its id to its
        largest child.
        """
        n = self.n
        y, z, mate, inb, label, labeledge, tj = (self.y, self.z, self.mate, self.inb, self.label,
                                                 self.labeledge, self.tj)
        parent, childs, bedges, adj, tol = self.parent, self.childs, self.bedges, self.adj, self.tol
        yoff, size, troot, park, base = self.yoff, self.size, self.troot, self.park, self.base
        stats = self.stats
        members: dict = {}
        heap: list = []
        push = heapq.heappush
        D = 0.0

        def yv(v):
            b = inb[v]
            lb = label[b]
            if lb == OUTER:
                return y[v] + yoff[b] - (D - tj[b])
            if lb == INNER:
                return y[v] + yoff[b] + (D - tj[b])
            return y[v] + yoff[b]

        def zv(b):
            lb = label[b]
            if lb == OUTER:
                return z[b] + 2.0 * (D - tj[b])
            if lb == INNER:
                return z[b] - 2.0 * (D - tj[b])
            return z[b]

        def settle(b):
            """Fold the lazy dual change of top-level blossom b into its offset and z."""
            lb = label[b]
            if lb != FREE:
                d = D - tj[b]
                if d != 0.0:
                    s = -d if lb == OUTER else d
                    yoff[b] += s
                    if b >= n:
                        z[b] -= 2.0 * s
            tj[b] = D

        def park_on(b, entry):
            """Let an edge from an outer vertex wait on inner blossom b until b's label changes."""
            p = park[b]
            if p is None:
                park[b] = [entry]
            else:
                p.append(entry)

        def requeue(entries):
            """Queue edges that waited on an inner blossom, now that its label has changed."""
            for a, c, w in entries:
                ba, bc = inb[a], inb[c]
                if ba == bc:
                    continue
                if label[ba] != OUTER:
                    if label[bc] != OUTER:
                        continue
                    a, c, ba, bc = c, a, bc, ba
                lc = label[bc]
                if lc == INNER:
                    park_on(bc, (a, c, w))
                    continue
                s = yv(a) + yv(c) - w
                push(heap, (D + (s if lc == FREE else 0.5 * s), 1, a, c, w))

        def scan(v):
            """Queue the events of a (new) outer vertex v: its y reaching 0, its edges tightening.

            Only the first few events go on the heap; the rest wait, in order, behind a
            refill entry keyed by the first of them (most trees augment before that)."""
            bv = inb[v]
            yvv = yv(v)
            at = D + yvv
            half = D + 0.5 * yvv
            ev = [(at, 0, v, -1, 0.0)]
            for u, w in adj[v]:
                bu = inb[u]
                if bu == bv:
                    continue
                lu = label[bu]
                if lu == FREE:  # slack falls at rate 1
                    ev.append((at + y[u] + yoff[bu] - w, 1, v, u, w))
                elif lu == OUTER:  # both ends fall: rate 2
                    ev.append((half + 0.5 * (y[u] + yoff[bu] - D + tj[bu] - w), 1, v, u, w))
                else:  # inner: slack stays until u's blossom changes label
                    park_on(bu, (v, u, w))
            if len(ev) <= BATCH:
                for e in ev:
                    push(heap, e)
                return
            ev.sort()
            for e in ev[:BATCH]:
                push(heap, e)
            epoch[v] += 1
            waiting[v] = ev
            push(heap, (ev[BATCH][0], 3, v, epoch[v], float(BATCH)))

        def make_outer(b, le, root):
            label[b] = OUTER
            labeledge[b] = le
            tj[b] = D
            troot[b] = root
            members[root].append(b)
            for v in self.leaves(b):
                scan(v)

        def make_inner(b, le, root):
            label[b] = INNER
            labeledge[b] = le
            tj[b] = D
            troot[b] = root
            members[root].append(b)
            if b >= n:
                push(heap, (D + z[b] / 2.0, 2, b, -1, 0.0))

        def walk_up(s, j):
            """Flip the alternating path from vertex s (in an outer or free blossom) to its root."""
            while True:
                bs = inb[s]
                if bs >= n:
                    self._augment_blossom(bs, s)
                mate[s] = j
                le = labeledge[bs]
                if le is None:
                    return
                t = le[0]
                bt = inb[t]
                s2, j2 = labeledge[bt]
                if bt >= n:
                    self._augment_blossom(bt, j2)
                mate[j2] = s2
                s, j = s2, j2

        def dissolve(root):
            """After its augmentation, a tree's blossoms lose their labels and become free."""
            waited = []
            for b in dict.fromkeys(members.pop(root)):
                if troot[b] == root and parent[b] == -1 and label[b] != FREE and (b < n or childs[b]):
                    settle(b)
                    label[b] = FREE
                    labeledge[b] = None
                    troot[b] = -1
                    if park[b]:
                        waited.extend(park[b])
                    park[b] = None
            requeue(waited)

        def relabel(c, host):
            """Leaves of top-level blossom c join blossom ``host`` (offsets carried over)."""
            d = yoff[c] - yoff[host]
            out = self.leaves(c)
            for x in out:
                y[x] += d
                inb[x] = host
            yoff[c] = 0.0
            return out

        def shrink(u, v):
            """Outer u and outer v of one tree are joined by a tight edge: a new blossom."""
            anc = set()
            b = inb[u]
            while True:
                anc.add(b)
                le = labeledge[b]
                if le is None:
                    break
                b = inb[labeledge[inb[le[0]]][0]]
            bb = inb[v]
            while bb not in anc:
                bb = inb[labeledge[inb[labeledge[bb][0]]][0]]

            def chain(b0):
                out = []
                b = b0
                while b != bb:
                    out.append(b)
                    t = inb[labeledge[b][0]]
                    out.append(t)
                    b = inb[labeledge[t][0]]
                return out
            up = list(reversed(chain(inb[u])))  # from the child of bb down to inb[u]
            cv = chain(inb[v])
            ch = [bb] + up + cv  # cycle order
            ed = [labeledge[c] for c in up]  # edge from the previous child to c
            ed.append((u, v))
            for c in cv:  # edge from c to the next child: c's label edge, reversed
                p, q = labeledge[c]
                ed.append((q, p))
            le_bb = labeledge[bb]
            root = troot[bb]
            the_base = base[bb] if bb >= n else bb
            for c in ch:
                settle(c)
            # the largest outer blossom child hands its id (so its leaves' inb and offset)
            # to the new blossom; its own contents move to a fresh id
            host = max((c for c in ch if c >= n and label[c] == OUTER), key=size.__getitem__, default=-1)
            fresh = self._new_id()
            if host >= 0 and size[host] > self.host_min:
                self._move(host, fresh)
                label[fresh], labeledge[fresh], troot[fresh], yoff[fresh], park[fresh] = FREE, None, -1, 0.0, None
                ch = [fresh if c == host else c for c in ch]
                nb = host
            else:
                nb = fresh
                yoff[nb] = 0.0
                park[nb] = None
            newly_outer = []
            total = 0
            for c in ch:
                total += size[c]
                if c != fresh or nb == fresh:
                    leaves = relabel(c, nb)
                    if label[c] == INNER:
                        newly_outer.extend(leaves)
                    # what waited on an inner child is covered by the scans of its leaves
                    park[c] = None
                parent[c] = nb
                label[c] = FREE
                labeledge[c] = None
                troot[c] = -1
            childs[nb] = ch
            bedges[nb] = ed
            base[nb] = the_base
            parent[nb] = -1
            size[nb] = total
            z[nb] = 0.0
            tj[nb] = D
            label[nb] = OUTER
            labeledge[nb] = le_bb
            troot[nb] = root
            members[root].append(nb)
            for x in newly_outer:
                scan(x)
            stats["shrink"] += 1

        def expand(b):
            """Inner blossom b has z = 0: its children become top-level, relabelled."""
            settle(b)
            waited = park[b] or ()
            park[b] = None
            root = troot[b]
            ch, ed = list(childs[b]), list(bedges[b])
            k = len(ch)
            p, q = labeledge[b]
            t = q
            while parent[t] != b:
                t = parent[t]
            i = ch.index(t)
            # the largest blossom child takes over the id b (and its leaves' offset)
            host = max((c for c in ch if c >= n), key=size.__getitem__, default=-1)
            if host >= 0 and size[host] > self.host_min:
                self._move(host, b)
                childs[host] = bedges[host] = None
                self._free_ids.append(host)
                ch = [b if c == host else c for c in ch]
            else:
                host = -1
            for c in ch:
                if c != b:
                    parent[c] = -1
                    yoff[c] = yoff[b]
                    if c >= n:
                        for x in self.leaves(c):
                            inb[x] = c
                    else:
                        inb[c] = c
                label[c] = FREE
                labeledge[c] = None
                troot[c] = -1
            if host >= 0:
                parent[b] = -1
            else:
                childs[b] = bedges[b] = None
                label[b], labeledge[b], troot[b] = FREE, None, -1
                self._free_ids.append(b)
            # the even path from the entry child to the base child alternates inner/outer
            path, links = [ch[i]], [(p, q)]
            j = i
            if i & 1:
                while j != k:
                    x, w = ed[j % k]
                    j += 1
                    path.append(ch[j % k])
                    links.append((x, w))
            else:
                while j != 0:
                    x, w = ed[j - 1]
                    j -= 1
                    path.append(ch[j])
                    links.append((w, x))
            for s, (c, le) in enumerate(zip(path, links)):
                if s % 2 == 0:
                    make_inner(c, le, root)
                else:
                    make_outer(c, le, root)
            requeue(waited)
            stats["expand"] += 1
        BATCH = 4
        epoch = [0] * self.n
        waiting: dict = {}
        for r in roots:
            members[r] = []
            stats["searches"] += 1
            make_outer(inb[r], None, r)
        pops = 0
        while heap and members:
            key, kind, a, c, w = heapq.heappop(heap)
            pops += 1
            if deadline is not None and pops % 4096 == 0 and time.perf_counter() > deadline:
                raise TimeoutError("blossom: time limit")
            if kind == 0:  # outer vertex a reaches y = 0
                ba = inb[a]
                if label[ba] != OUTER:
                    continue
                when = D + yv(a)
                if when > key + tol:
                    push(heap, (when, 0, a, -1, 0.0))
                    continue
                D = max(D, when)
                root = troot[ba]
                # the tree's inner vertices: with every edge from an outer vertex used up,
                # they separate its outer blossoms from the rest (a Tutte barrier)
                for b in members[root]:
                    if troot[b] == root and label[b] == INNER and parent[b] == -1 and (b < n or childs[b]):
                        self.barrier.update(self.leaves(b))
                walk_up(a, -1)
                dissolve(root)
                stats["single"] += 1
                continue
            if kind == 3:  # the next events of outer vertex a, if it is still the same outer vertex
                if c != epoch[a]:
                    continue
                ev = waiting[a]
                k0 = int(w)
                if label[inb[a]] != OUTER:
                    # a's tree has dissolved: only the edges to outer vertices still matter
                    # (their slack fell at twice the rate the other side's entry assumed)
                    for e in ev[k0:]:
                        if e[1] == 1 and label[inb[e[3]]] == OUTER:
                            push(heap, e)
                    del waiting[a]
                    continue
                for e in ev[k0:k0 + BATCH]:
                    push(heap, e)
                if k0 + BATCH < len(ev):
                    push(heap, (ev[k0 + BATCH][0], 3, a, c, float(k0 + BATCH)))
                else:
                    del waiting[a]
                continue
            if kind == 2:  # inner blossom a reaches z = 0
                if parent[a] != -1 or label[a] != INNER or childs[a] is None:
                    continue
                when = D + zv(a) / 2.0
                if when > key + tol:
                    push(heap, (when, 2, a, -1, 0.0))
                    continue
                D = max(D, when)
                expand(a)
                continue
            ba, bc = inb[a], inb[c]
            if ba == bc:
                continue
            if label[ba] != OUTER:
                # a's tree has dissolved since; the edge still matters from c's side
                if label[bc] != OUTER:
                    continue
                a, c, ba, bc = c, a, bc, ba
            lc = label[bc]
            if lc == INNER:  # wait until c's blossom is no longer inner
                park_on(bc, (a, c, w))
                continue
            s = yv(a) + yv(c) - w
            if lc == FREE:
                when = D + s
                if when > key + tol:
                    push(heap, (when, 1, a, c, w))
                    continue
                D = max(D, when)
                bbase = self.base[bc] if bc >= n else bc
                if mate[bbase] < 0:
                    # augmenting path: a's root ... a - c ... the single base of c's blossom
                    root = troot[ba]
                    walk_up(a, c)
                    if bc >= n:
                        self._augment_blossom(bc, c)
                    mate[c] = a
                    dissolve(root)
                    stats["augment"] += 1
                    continue
                # c's blossom becomes inner, its mate's blossom outer
                m = mate[bbase]
                root = troot[ba]
                make_inner(bc, (a, c), root)
                make_outer(inb[m], (bbase, m), root)
                stats["grow"] += 1
            else:  # both outer
                when = D + s / 2.0
                if when > key + tol:
                    push(heap, (when, 1, a, c, w))
                    continue
                D = max(D, when)
                ra, rc = troot[ba], troot[bc]
                if ra == rc:
                    shrink(a, c)
                else:  # augmenting path between two trees
                    walk_up(a, c)
                    walk_up(c, a)
                    dissolve(ra)
                    dissolve(rc)
                    stats["augment"] += 1
        if members:
            raise RuntimeError("blossom: trees left with no event (a root without edges?)")

    # -------------------------------------------------------------- results
    def blossoms(self):
        """(leaf array, z) of every blossom with z > 0."""
        out = []
        for b in range(self.n, len(self.parent)):
            if self.childs[b] is not None and self.z[b] > 0.0:
                out.append((np.array(sorted(self.leaves(b)), np.int64), self.z[b]))
        return out

    def mates(self):
        return np.array(self.mate, np.int64)

    def duals(self):
        """Vertex duals y (the offsets of the vertices' blossoms included)."""
        yoff, inb = self.yoff, self.inb
        return np.array([yv + yoff[inb[v]] for v, yv in enumerate(self.y)], float)
