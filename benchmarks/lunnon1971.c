/*
 * lunnon1971.c -- plain C transcription of Lunnon's 1971 leaf-insertion
 * procedure for counting the foldings of a p1 x p2 x ... x pd map.
 *
 * This is the baseline the numba kernel is benchmarked against, so it is a
 * deliberately straightforward transcription: int arrays, one iterative
 * loop, no symmetry or pruning beyond Lunnon's own "leaf 1 on top" rule.
 * Build with plain `gcc -O3` (see benchmarks/plainc.py).
 *
 * Usage:   ./lunnon1971 p1 p2 ... pd
 * Output:  stdout: the number of foldings, one decimal integer and a newline.
 *          stderr: the seconds spent in the search loop alone (table set-up
 *                  excluded), measured with clock_gettime: wall time
 *                  (CLOCK_MONOTONIC), a space, and CPU time of this
 *                  process (CLOCK_PROCESS_CPUTIME_ID), and a newline.
 * Errors:  one line on stderr, exit status 2.
 *
 * Leaves (cells) are numbered 1..n in mixed radix, first side fastest:
 * leaf m has 1-based coordinate c_i(m) = ((m-1) / s_i) % p_i + 1 in
 * dimension i, with stride s_i = p1*...*p_{i-1}.  Leaf 0 is a sentinel.
 */
#define _POSIX_C_SOURCE 199309L
#include <errno.h>
#include <stdio.h>
#include <stdlib.h>
#include <time.h>

/* Keeps the d*(n+1)^2 connection table and the n*n gap pool small. */
#define MOST_CELLS 1024

static void fail(const char *msg, const char *arg)
{
    fprintf(stderr, "lunnon1971: %s%s\n", msg, arg ? arg : "");
    exit(2);
}

static void *alloc_zeroed(size_t count, size_t size)
{
    void *p = calloc(count, size);
    if (!p)
        fail("out of memory", NULL);
    return p;
}

int main(int argc, char **argv)
{
    int dims = argc - 1;
    if (dims < 1)
        fail("usage: lunnon1971 p1 p2 ... pd (each side a whole number >= 1)", NULL);
    if (dims > 64)
        fail("too many sides for this baseline (at most 64)", NULL);

    int *side = alloc_zeroed((size_t)dims, sizeof(int));
    int *stride = alloc_zeroed((size_t)dims, sizeof(int));
    long cells = 1;
    for (int i = 0; i < dims; i++) {
        char *end;
        errno = 0;
        long p = strtol(argv[i + 1], &end, 10);
        if (errno || end == argv[i + 1] || *end != '\0' || p < 1)
            fail("side is not a whole number >= 1: ", argv[i + 1]);
        if (p > MOST_CELLS || cells * p > MOST_CELLS)
            fail("too many cells for this baseline (at most 1024)", NULL);
        stride[i] = (int)cells;
        side[i] = (int)p;
        cells *= p;
    }
    const int n = (int)cells;
    const int row = n + 1;               /* leaves 0..n index every table row */

    /* coord[i*row + m] = c_i(m); the sentinel column stays 0. */
    int *coord = alloc_zeroed((size_t)dims * row, sizeof(int));
    for (int i = 0; i < dims; i++)
        for (int m = 1; m <= n; m++)
            coord[i * row + m] = ((m - 1) / stride[i]) % side[i] + 1;

    /*
     * Connection table link[(i*row + l)*row + m], for 1 <= m <= l <= n.
     * While leaf l is being placed, the creases of dimension i that can
     * block it are those in the same parity class as l's crease to its
     * lower neighbour l - s_i.  For an already placed leaf m the entry is
     * the other end of m's crease in that class when that end is placed
     * too (so the pair is a crease that l must not cross), otherwise m
     * itself.  Entries with m > l, and the sentinel m = 0, are 0.
     */
    int *link = alloc_zeroed((size_t)dims * row * row, sizeof(int));
    for (int i = 0; i < dims; i++) {
        for (int l = 1; l <= n; l++) {
            int *out = link + ((size_t)i * row + l) * row;
            for (int m = 1; m <= l; m++) {
                int cm = coord[i * row + m];
                int parity_gap = coord[i * row + l] - cm;
                if (parity_gap % 2 == 0)
                    /* m has l's parity: its class crease goes down to m - s_i. */
                    out[m] = (cm == 1) ? m : m - stride[i];
                else
                    /* opposite parity: class crease goes up to m + s_i, if placed. */
                    out[m] = (cm == side[i] || m + stride[i] > l) ? m : m + stride[i];
            }
        }
    }

    /*
     * The stack is a circular doubly linked list through the sentinel 0:
     * up[x] is the leaf just above x, down[x] the leaf just below; reading
     * down[] from 0 lists the stack top to bottom.  A "gap" m means the
     * slot just below leaf m (m = 0: the top of the stack).
     */
    int *up = alloc_zeroed((size_t)row + 1, sizeof(int));
    int *down = alloc_zeroed((size_t)row + 1, sizeof(int));
    int *hits = alloc_zeroed((size_t)row + 1, sizeof(int));     /* per-gap tally */
    int *level_base = alloc_zeroed((size_t)row + 1, sizeof(int)); /* first gap of each level */
    int *pool = alloc_zeroed((size_t)n * n + n + 1, sizeof(int)); /* gap lists, level by level */

    unsigned long long total = 0;
    int leaf = 1;    /* the leaf being placed next */
    int top = 0;     /* one past the last untried gap of the current level */

    struct timespec t0, t1, c0, c1;
    clock_gettime(CLOCK_MONOTONIC, &t0);
    clock_gettime(CLOCK_PROCESS_CPUTIME_ID, &c0);

    while (leaf > 0) {
        /*
         * Lunnon counts only foldings with leaf 1 on top; every folding is
         * a cyclic rotation of exactly one of those, so each stands for n.
         * A partial stack with another leaf above leaf 1 never gets there,
         * so its node is left with no gaps and is abandoned below.
         */
        if (leaf <= 1 || down[0] == 1) {
            if (leaf > n) {
                total += (unsigned long long)n;
            } else {
                int free_dims = 0;            /* dims where leaf has no lower neighbour */
                int fill = level_base[leaf - 1];
                top = fill;
                const int *tbl = link + (size_t)leaf * row;
                for (int i = 0; i < dims; i++) {
                    const int *li = tbl + (size_t)i * row * row;
                    if (li[leaf] == leaf) {
                        free_dims++;
                    } else {
                        /*
                         * Walk the stack from leaf's lower neighbour, jumping
                         * across every placed class crease; the slots visited
                         * are exactly those where leaf's own crease crosses
                         * none of them in this dimension.
                         */
                        int m = li[leaf];
                        while (m != leaf) {
                            pool[fill] = m;
                            if (hits[m] == 0)
                                fill++;
                            hits[m]++;
                            m = li[down[m]];
                        }
                    }
                }
                /* Unconstrained in every dimension: any slot will do. */
                if (free_dims == dims)
                    for (int m = 0; m < leaf; m++)
                        pool[fill++] = m;
                /* Keep the slots allowed by every constraining dimension. */
                for (int j = top; j < fill; j++) {
                    pool[top] = pool[j];
                    if (hits[pool[j]] == dims - free_dims)
                        top++;
                    hits[pool[j]] = 0;
                }
            }
        }
        /*
         * No untried gap left at this level (always so after a complete
         * stack, and after a pruned one, since top == level_base[leaf-1]
         * then): lift leaves off until some level still has one.
         */
        while (leaf > 0 && top == level_base[leaf - 1]) {
            leaf--;
            /* (at leaf 0 this unlinks the lone sentinel from itself: a no-op) */
            down[up[leaf]] = down[leaf];
            up[down[leaf]] = up[leaf];
        }
        /* Place the leaf in the next untried gap and go one level deeper. */
        if (leaf > 0) {
            top--;
            int m = pool[top];
            up[leaf] = m;
            down[leaf] = down[m];
            down[m] = leaf;
            up[down[leaf]] = leaf;
            level_base[leaf] = top;
            leaf++;
        }
    }

    clock_gettime(CLOCK_PROCESS_CPUTIME_ID, &c1);
    clock_gettime(CLOCK_MONOTONIC, &t1);
    double seconds = (double)(t1.tv_sec - t0.tv_sec) + 1e-9 * (double)(t1.tv_nsec - t0.tv_nsec);
    double cpu = (double)(c1.tv_sec - c0.tv_sec) + 1e-9 * (double)(c1.tv_nsec - c0.tv_nsec);

    printf("%llu\n", total);
    fprintf(stderr, "%.6f %.6f\n", seconds, cpu);

    free(pool); free(level_base); free(hits); free(down); free(up);
    free(link); free(coord); free(stride); free(side);
    return 0;
}
