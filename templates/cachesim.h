/* looptile cache model: an ideal set-associative LRU cache hierarchy, fed one
 * array-element access at a time (looptile simulate).  Self-contained C99; every
 * function and every piece of state is static, so each program that includes
 * this header has its own private simulator.  Not thread-safe: the instrumented
 * program calls it from one thread, in the order the emitted code runs.
 *
 * Interface
 *   lt_sim_init(nlevels, size[], ways[], line[], narrays)   ways 0 (or = lines): fully associative
 *   lt_sim_access(addr, array, is_write)                    one element access, array in 0..narrays-1
 *                                                           (not checked: the caller's guarantee)
 *   lt_sim_finish()                                         flush dirty lines (end of the run)
 *   lt_sim_report(out)                                      one JSON object on one line
 *
 * Policy (looptile/cachesim.py implements exactly the same one in Python)
 *   - Levels L1..Ln, checked in turn.  Each level is LRU within its set; the set
 *     of a line is (address / line size) mod (number of sets).
 *   - A demand access looks up L1.  A hit stops there (the line becomes the most
 *     recently used of its set).  A miss allocates the line in that level, evicting
 *     the set's least recently used line when the set is full (write-allocate: a
 *     write miss also allocates), and goes on to the next level as a read of that
 *     line.  A miss in the last level is a memory read of one last-level line.
 *   - A write marks the line dirty in L1 only; the levels below hold it clean
 *     until a write-back reaches them.
 *   - An evicted dirty line is written back: the level counts one write-back
 *     (its "writebacks"), and the line goes to the next level before the miss
 *     that evicted it goes on.  A write-back is not a demand access: it is not in
 *     any "accesses", "hits" or "misses".  If the next level holds the line, the
 *     line becomes dirty and most recently used there; if not, the write-back
 *     is not allocated there but passes on to the level after it (write-back
 *     without allocation), and out of the last level it is memory traffic of the
 *     written line's size.  So a write-back never evicts anything and there is
 *     no cascade.  Clean evictions are silent.
 *   - Levels are not inclusive: an eviction from L2 leaves the line in L1.
 *   - Line sizes must not decrease towards memory (an element never straddles
 *     lines: the caller guarantees elements are naturally aligned, no larger
 *     than a line, and arrays start line-aligned).  Addresses below 2^63.
 *   - lt_sim_finish flushes L1, then L2, ..., then Ln: every dirty line is
 *     written back as above (counted in its level's "writebacks") and becomes
 *     clean; what leaves the last level is memory write traffic.
 *   - Per-array counts are the demand accesses of that array at each level (a
 *     lower level's access is attributed to the array whose miss caused it).
 *   - memory.read_bytes = last-level misses x last-level line; memory.write_bytes
 *     = the bytes of the write-backs that left the last level.
 *
 * Speed and memory.  A level of at most 16 ways ("small sets") keeps one 32-bit
 * word per way: the tag (line / sets) in bits 5-31, the way's LRU rank in bits
 * 1-4 (0 the most recently used .. ways-1 the least; the ranks of a set are a
 * permutation, free ways ranked behind the lines) and dirty in bit 0.  A set's
 * words lie side by side, padded to 4, 8 or 16 words, from a 64-byte boundary,
 * so 16 ways are one host cache line and the whole state of the set.  A lookup
 * compares the tag with every way of the set at once (SSE2 when the compiler
 * targets it, four ways per instruction; else a loop without early exit), so
 * nothing branches on where the line is; a hit or a miss then ages every way
 * more recent than the one it uses, again all at once, and a miss takes the
 * way that did not age.  The words need line / sets below 2^27 - 1 at every
 * small-set level (addresses below 512 GiB for an 8-way 32 KiB L1 of 64-byte
 * lines); the first address beyond that turns every small-set level into the
 * other structure, with its lines, LRU order and dirty bits, for the rest of
 * the run.
 * The other structure, for fully associative or wider levels: a hash table and
 * a doubly linked LRU list per set (O(1) per access, 64-bit line numbers).
 * Counts: per array, the accesses that went down to each depth (hit in L1, hit
 * in L2, ..., missed everywhere), one increment per access; the report sums
 * them into the per-level counts.  In a stretch where more than a quarter of
 * the accesses miss L1 (decided per 1024 accesses), accesses may wait in a
 * queue of 16, in order, while the sets they need in levels of at least
 * 256 KiB of state are prefetched, so that the host's memory latency overlaps.
 * That pays off for scattered accesses and costs time on regular walks, whose
 * sets the host's caches hold anyway; so with the x86 time-stamp counter the
 * model times 3 windows with the queue and 3 without in every 64 miss-heavy
 * windows and runs the rest the faster way (without the counter: always
 * queued).  None of this changes a count.  Memory depends on the geometry
 * only, never on the length of the trace.  Defining LT_SIM_PORTABLE before the
 * include leaves out the compiler builtins and SSE2 (plain C99, the same
 * counts).  With LOOPTILE_PROGRESS in the environment, a progress line goes
 * to stderr every 2^26 accesses and a newline at lt_sim_finish.
 */
#ifndef LOOPTILE_CACHESIM_H
#define LOOPTILE_CACHESIM_H

#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#if defined(__GNUC__) || defined(__clang__)
#define LT_SIM_UNUSED __attribute__((unused))
#else
#define LT_SIM_UNUSED
#endif
#if (defined(__GNUC__) || defined(__clang__)) && !defined(LT_SIM_PORTABLE)
#define LT_SIM_GNU 1
#define LT_SIM_NOINLINE __attribute__((noinline))
#define LT_SIM_INLINE inline __attribute__((always_inline))
#define LT_SIM_LIKELY(x) __builtin_expect(!!(x), 1)
#define LT_SIM_PREFETCH(p) __builtin_prefetch(p)
#else
#define LT_SIM_GNU 0
#define LT_SIM_NOINLINE
#define LT_SIM_INLINE inline
#define LT_SIM_LIKELY(x) (x)
#define LT_SIM_PREFETCH(p) ((void)(p))
#endif
#if defined(__SSE2__) && !defined(LT_SIM_PORTABLE)
#define LT_SIM_SSE2 1
#include <emmintrin.h>
#else
#define LT_SIM_SSE2 0
#endif

#define LT_SIM_MAX_LEVELS 8
#define LT_SIM_SMALL_WAYS 16u    /* at most this many ways: small sets (4-bit ranks) */
/* a way's word in a small set */
#define LT_SIM_DIRTY 1u
#define LT_SIM_RANK 0x1eu        /* rank << 1 */
#define LT_SIM_TAG 0xffffffe0u   /* tag << 5 */
#define LT_SIM_FREE 0xffffffe0u  /* the tag of a free way: all ones, never a line's (clean) */
#define LT_SIM_TAG_LIMIT ((1ULL << 27) - 1)   /* line / sets must stay below this */
#define LT_SIM_HIT (~0ULL)       /* a lookup hit */
#define LT_SIM_CLEAN (~1ULL)     /* a lookup missed and evicted no dirty line (else: that line) */
#define LT_SIM_NIL 0xffffffffu   /* end of a list or hash chain */
#define LT_SIM_PROGRESS_BITS 26

typedef struct {
    unsigned long long tag;      /* line number */
    unsigned prev, next;         /* the set's LRU list, most recent first */
    unsigned hnext;              /* next node of the same hash bucket */
    unsigned dirty;
} lt_sim_node;

typedef struct {
    unsigned line_bits, set_bits;
    int listed;                  /* 0: small sets, 1: hash + lists */
    int sets_pow2;
    unsigned assoc;
    unsigned stride;             /* small sets: words per set: 4, 8 or 16, at least assoc */
    unsigned long long line, sets, set_mask;
    /* small sets: set s is way[s*stride .. s*stride+stride-1] (see the top of the file); the
     * words from assoc on are padding: tag FREE, rank 15, clean, never used */
    unsigned *way;
    void *way_block;             /* the allocation holding way */
    /* listed sets */
    lt_sim_node *node;           /* set s owns nodes s*assoc .. s*assoc+assoc-1 */
    unsigned *head, *tail, *used;
    unsigned *bucket;
    unsigned hash_shift;
    unsigned long long writebacks;
} lt_sim_level;

static lt_sim_level lt_sim_lv[LT_SIM_MAX_LEVELS];
static int lt_sim_nlevels;
static int lt_sim_narrays;
/* lt_sim_depth[a][d]: accesses of array a that missed exactly levels 0..d-1 (d = nlevels:
 * every level).  Level k's accesses of a are the sum over d >= k; its hits, d = k. */
static unsigned long long (*lt_sim_depth)[LT_SIM_MAX_LEVELS + 1];
static unsigned long long lt_sim_write_bytes;
static unsigned long long lt_sim_small_below;   /* addresses the small sets take (see lt_sim_widen) */
static unsigned long long lt_sim_chunks;
static int lt_sim_progress_on, lt_sim_progress_shown;
#define LT_SIM_AHEAD 16u         /* accesses queued while their sets are prefetched (power of two) */
static unsigned long long lt_sim_qaddr[LT_SIM_AHEAD];
static int lt_sim_qmeta[LT_SIM_AHEAD];   /* array * 2 + is_write; -1: empty */
static unsigned lt_sim_qpos;
/* What to prefetch for a queued access: per level below L1 with at least LT_SIM_PREFETCH_BYTES
 * of words (small sets, 2^k of them) or hash buckets, the word or bucket where the lookup of
 * address a starts: base[((a >> shift) & mask) << stride_bits], or base[hash(a >> shift)]. */
#define LT_SIM_PREFETCH_BYTES (256u << 10)
static struct {
    const unsigned *base;
    const lt_sim_level *hashed;  /* a listed level (its hash), or NULL */
    unsigned shift, stride_bits;   /* line bits; log2 of the words per set */
    unsigned long long mask;
} lt_sim_pf[LT_SIM_MAX_LEVELS];
static int lt_sim_npf;
#define LT_SIM_WINDOW_BITS 10
#define LT_SIM_WINDOW (1u << LT_SIM_WINDOW_BITS)
static unsigned lt_sim_window_left = LT_SIM_WINDOW, lt_sim_window_misses;
static unsigned long long lt_sim_windows;
static int lt_sim_ahead_on;
/* Queue or not in a miss-heavy stretch (see the top of the file): of every LT_SIM_TRIAL
 * miss-heavy windows, windows 0-3 run queued and 4-7 not; 1-3 and 5-7 are timed (0 and 4
 * fill or empty the queue) and the rest run the faster way.  The time-stamp counter is GCC's
 * and Clang's __builtin_ia32_rdtsc (x86 only; named from memory of the GCC manual, "x86
 * Built-in Functions"). */
#if LT_SIM_GNU && (defined(__x86_64__) || defined(__i386__))
#define LT_SIM_CLOCK() __builtin_ia32_rdtsc()
#define LT_SIM_TIMED 1
#else
#define LT_SIM_CLOCK() 0ULL
#define LT_SIM_TIMED 0
#endif
#define LT_SIM_TRIAL 64u
static unsigned long long lt_sim_clock, lt_sim_trial_time[2];
static unsigned lt_sim_heavy;    /* the window running, if miss-heavy: its place in the cycle */
static int lt_sim_ahead_best = 1;

static LT_SIM_UNUSED void lt_sim_fail(const char *what)
{
    fprintf(stderr, "looptile cachesim: %s\n", what);
    exit(2);
}

static LT_SIM_UNUSED void *lt_sim_alloc(size_t n, size_t size)
{
    void *p = calloc(n ? n : 1, size);
    if (!p)
        lt_sim_fail("out of memory for the cache model");
    return p;
}

static LT_SIM_UNUSED void lt_sim_free(void)
{
    int k;
    for (k = 0; k < lt_sim_nlevels; k++) {
        lt_sim_level *L = &lt_sim_lv[k];
        free(L->way_block); free(L->node); free(L->head); free(L->tail); free(L->used); free(L->bucket);
        memset(L, 0, sizeof *L);
    }
    free(lt_sim_depth);
    lt_sim_depth = NULL;
    lt_sim_nlevels = 0;
}

static LT_SIM_UNUSED unsigned lt_sim_log2(unsigned long long x)
{
    unsigned b = 0;
    while ((1ULL << b) < x)
        b++;
    return b;
}

/* The number of trailing zero bits of x (x != 0). */
static inline unsigned lt_sim_ctz(unsigned x)
{
#if LT_SIM_GNU
    return (unsigned)__builtin_ctz(x);
#else
    unsigned n = 0;
    while (!(x & 1u)) {
        x >>= 1;
        n++;
    }
    return n;
#endif
}

/* The set of line ln, and its tag ln / sets in *t. */
static inline unsigned long long lt_sim_split(const lt_sim_level *L, unsigned long long ln, unsigned long long *t)
{
    if (LT_SIM_LIKELY(L->sets_pow2)) {
        *t = ln >> L->set_bits;
        return ln & L->set_mask;
    }
    *t = ln / L->sets;
    return ln - *t * L->sets;
}

/* ---- listed sets: hash table + one LRU list per set ---- */

static inline unsigned lt_sim_hash(const lt_sim_level *L, unsigned long long ln)
{
    return (unsigned)((ln * 0x9E3779B97F4A7C15ULL) >> L->hash_shift);
}

static LT_SIM_UNUSED void lt_sim_list_alloc(lt_sim_level *L)
{
    unsigned long long i, lines = L->sets * L->assoc;
    unsigned hb = lt_sim_log2(2 * lines);   /* load factor at most 1/2 */
    L->hash_shift = 64 - hb;
    L->node = (lt_sim_node *)lt_sim_alloc((size_t)lines, sizeof(lt_sim_node));
    L->head = (unsigned *)lt_sim_alloc((size_t)L->sets, sizeof(unsigned));
    L->tail = (unsigned *)lt_sim_alloc((size_t)L->sets, sizeof(unsigned));
    L->used = (unsigned *)lt_sim_alloc((size_t)L->sets, sizeof(unsigned));
    L->bucket = (unsigned *)lt_sim_alloc((size_t)1 << hb, sizeof(unsigned));
    for (i = 0; i < L->sets; i++)
        L->head[i] = L->tail[i] = LT_SIM_NIL;
    for (i = 0; i < (1ULL << hb); i++)
        L->bucket[i] = LT_SIM_NIL;
}

static unsigned lt_sim_find(const lt_sim_level *L, unsigned long long ln)
{
    unsigned n = L->bucket[lt_sim_hash(L, ln)];
    while (n != LT_SIM_NIL && L->node[n].tag != ln)
        n = L->node[n].hnext;
    return n;
}

static void lt_sim_unlink(lt_sim_level *L, unsigned long long s, unsigned n)
{
    lt_sim_node *x = &L->node[n];
    if (x->prev != LT_SIM_NIL) L->node[x->prev].next = x->next; else L->head[s] = x->next;
    if (x->next != LT_SIM_NIL) L->node[x->next].prev = x->prev; else L->tail[s] = x->prev;
}

static void lt_sim_push_front(lt_sim_level *L, unsigned long long s, unsigned n)
{
    lt_sim_node *x = &L->node[n];
    x->prev = LT_SIM_NIL;
    x->next = L->head[s];
    if (x->next != LT_SIM_NIL) L->node[x->next].prev = n; else L->tail[s] = n;
    L->head[s] = n;
}

static void lt_sim_unhash(lt_sim_level *L, unsigned n)
{
    unsigned *p = &L->bucket[lt_sim_hash(L, L->node[n].tag)];
    while (*p != n)
        p = &L->node[*p].hnext;
    *p = L->node[n].hnext;
}

/* Node n of set s, unused, now holds line ln, most recently used. */
static void lt_sim_list_put(lt_sim_level *L, unsigned long long s, unsigned n, unsigned long long ln, unsigned dirty)
{
    unsigned h = lt_sim_hash(L, ln);
    L->node[n].tag = ln;
    L->node[n].dirty = dirty;
    L->node[n].hnext = L->bucket[h];
    L->bucket[h] = n;
    lt_sim_push_front(L, s, n);
}

/* Look ln up: HIT (now most recent, dirty ORed in), or allocate it and return the dirty line
 * evicted, or CLEAN. */
static unsigned long long lt_sim_list_touch(lt_sim_level *L, unsigned long long ln, unsigned dirty)
{
    unsigned long long t, s = lt_sim_split(L, ln, &t), victim = LT_SIM_CLEAN;
    unsigned n = lt_sim_find(L, ln);
    if (n != LT_SIM_NIL) {
        L->node[n].dirty |= dirty;
        if (L->head[s] != n) {
            lt_sim_unlink(L, s, n);
            lt_sim_push_front(L, s, n);
        }
        return LT_SIM_HIT;
    }
    if (L->used[s] < L->assoc) {
        n = (unsigned)(s * L->assoc) + L->used[s]++;
    } else {
        n = L->tail[s];
        if (L->node[n].dirty)
            victim = L->node[n].tag;
        lt_sim_unlink(L, s, n);
        lt_sim_unhash(L, n);
    }
    lt_sim_list_put(L, s, n, ln, dirty);
    return victim;
}

static int lt_sim_list_mark(lt_sim_level *L, unsigned long long ln)
{
    unsigned n = lt_sim_find(L, ln);
    unsigned long long t, s;
    if (n == LT_SIM_NIL)
        return 0;
    s = lt_sim_split(L, ln, &t);
    L->node[n].dirty = 1;
    if (L->head[s] != n) {
        lt_sim_unlink(L, s, n);
        lt_sim_push_front(L, s, n);
    }
    return 1;
}

/* ---- small sets: one word per way, tag | rank | dirty ---- */

#if LT_SIM_SSE2
/* One bit per way from the all-ones lanes of c0..c3, four ways each (c1..c3 only as far as
 * stride reaches). */
static LT_SIM_INLINE unsigned lt_sim_bits(unsigned stride, __m128i c0, __m128i c1, __m128i c2, __m128i c3)
{
    if (stride == 4)
        return (unsigned)_mm_movemask_ps(_mm_castsi128_ps(c0));
    if (stride == 8)
        return (unsigned)_mm_movemask_epi8(_mm_packs_epi16(_mm_packs_epi32(c0, c1), _mm_setzero_si128()));
    return (unsigned)_mm_movemask_epi8(_mm_packs_epi16(_mm_packs_epi32(c0, c1), _mm_packs_epi32(c2, c3)));
}
#endif

/* The ways of a set (words w[0..stride-1]) whose word & mask is key, one bit per way.  Every
 * word is compared: nothing branches on where the match is.  Padding never matches. */
static LT_SIM_INLINE unsigned lt_sim_match(const unsigned *w, unsigned stride, unsigned mask, unsigned key)
{
#if LT_SIM_SSE2
    /* four ways per compare */
    const __m128i m = _mm_set1_epi32((int)mask), k = _mm_set1_epi32((int)key), z = _mm_setzero_si128();
    __m128i c1 = z, c2 = z, c3 = z;
#define LT_SIM_EQ4(g) _mm_cmpeq_epi32(_mm_and_si128(_mm_load_si128((const __m128i *)(const void *)(w + (g))), m), k)
    if (stride > 4)
        c1 = LT_SIM_EQ4(4);
    if (stride > 8) {
        c2 = LT_SIM_EQ4(8);
        c3 = LT_SIM_EQ4(12);
    }
    return lt_sim_bits(stride, LT_SIM_EQ4(0), c1, c2, c3);
#undef LT_SIM_EQ4
#else
    unsigned i, found = 0;
    for (i = 0; i < stride; i++)
        found |= (unsigned)((w[i] & mask) == key) << i;
    return found;
#endif
}

/* Every way of rank below r (more recent than the way of rank r) ages by one.  With replace
 * (a miss, r = assoc-1), the first way that does not age is the victim (the one of rank
 * assoc-1: padding words come after the real ways): it becomes word, and its old word is
 * returned.  The victim's word is
 * read before the set's 16-byte stores, and the caller reads a hit's word before calling
 * this: a 4-byte load from part of a 16-byte store still in flight waits for it to complete
 * (store-to-load forwarding fails); reading it after them cost about a tenth of the column
 * walk's time (measured with perf). */
static LT_SIM_INLINE unsigned lt_sim_age(unsigned *w, unsigned stride, unsigned r, int replace, unsigned word)
{
#if LT_SIM_SSE2
    const __m128i rank = _mm_set1_epi32((int)LT_SIM_RANK), two = _mm_set1_epi32(2), z = _mm_setzero_si128();
    const __m128i r2 = _mm_set1_epi32((int)(r << 1));
    __m128i v0, v1 = z, v2 = z, v3 = z, y0, y1 = z, y2 = z, y3 = z;
    unsigned old = 0, i;
    v0 = _mm_load_si128((const __m128i *)(const void *)w);
    y0 = _mm_cmpgt_epi32(r2, _mm_and_si128(v0, rank));
    if (stride > 4) {
        v1 = _mm_load_si128((const __m128i *)(const void *)(w + 4));
        y1 = _mm_cmpgt_epi32(r2, _mm_and_si128(v1, rank));
    }
    if (stride > 8) {
        v2 = _mm_load_si128((const __m128i *)(const void *)(w + 8));
        v3 = _mm_load_si128((const __m128i *)(const void *)(w + 12));
        y2 = _mm_cmpgt_epi32(r2, _mm_and_si128(v2, rank));
        y3 = _mm_cmpgt_epi32(r2, _mm_and_si128(v3, rank));
    }
    if (replace) {
        i = lt_sim_ctz(~lt_sim_bits(stride, y0, y1, y2, y3));
        old = w[i];
    }
    _mm_store_si128((__m128i *)(void *)w, _mm_add_epi32(v0, _mm_and_si128(y0, two)));
    if (stride > 4)
        _mm_store_si128((__m128i *)(void *)(w + 4), _mm_add_epi32(v1, _mm_and_si128(y1, two)));
    if (stride > 8) {
        _mm_store_si128((__m128i *)(void *)(w + 8), _mm_add_epi32(v2, _mm_and_si128(y2, two)));
        _mm_store_si128((__m128i *)(void *)(w + 12), _mm_add_epi32(v3, _mm_and_si128(y3, two)));
    }
    if (replace)
        w[i] = word;
    return old;
#else
    unsigned i, younger = 0, old = 0;
    for (i = 0; i < stride; i++)
        younger |= (unsigned)((w[i] & LT_SIM_RANK) < (r << 1)) << i;
    for (i = 0; i < stride; i++)
        w[i] += (younger >> i & 1u) << 1;
    if (replace) {
        i = lt_sim_ctz(~younger);
        old = w[i];
        w[i] = word;
    }
    return old;
#endif
}

/* Look ln up: HIT (now most recent, dirty ORed in), or put it in the way of the largest rank
 * (a free way while there is one, else the least recently used line) and return the dirty
 * line that way held, or CLEAN. */
static LT_SIM_INLINE unsigned long long lt_sim_small_lookup(lt_sim_level *L, unsigned long long ln, unsigned dirty,
                                                            unsigned stride)
{
    unsigned long long t, s = lt_sim_split(L, ln, &t);
    unsigned *w = L->way + (size_t)s * stride, key = (unsigned)t << 5, old, i;
    unsigned m = lt_sim_match(w, stride, LT_SIM_TAG, key);
    if (m) {
        /* (stores only when something changes: a 4-byte store into the set just before the
         * next access's 16-byte loads of it stalls them, store-to-load forwarding failing;
         * storing every time made the matmul stream twice as slow) */
        i = lt_sim_ctz(m);
        old = w[i];
        if (old & LT_SIM_RANK) {
            lt_sim_age(w, stride, (old & LT_SIM_RANK) >> 1, 0, 0);
            w[i] = (old & ~LT_SIM_RANK) | dirty;
        } else if (dirty & ~old) {
            w[i] = old | dirty;
        }
        return LT_SIM_HIT;
    }
    /* every way but the one of rank assoc-1 (and the padding) ages; that one is the victim */
    old = lt_sim_age(w, stride, L->assoc - 1, 1, key | dirty);
    /* free ways are clean */
    return (old & LT_SIM_DIRTY) ? (unsigned long long)(old >> 5) * L->sets + s : LT_SIM_CLEAN;
}

/* lt_sim_small_lookup with the set's size a constant, so that its loops and its tests on the
 * size unroll and fold away. */
static LT_SIM_INLINE unsigned long long lt_sim_small_touch(lt_sim_level *L, unsigned long long ln, unsigned dirty)
{
    if (L->stride == 8)
        return lt_sim_small_lookup(L, ln, dirty, 8);
    if (L->stride == 16)
        return lt_sim_small_lookup(L, ln, dirty, 16);
    return lt_sim_small_lookup(L, ln, dirty, 4);
}

/* A write-back into a small-set level: dirty and most recent if present. */
static int lt_sim_small_mark(lt_sim_level *L, unsigned long long ln)
{
    unsigned long long t, s = lt_sim_split(L, ln, &t);
    unsigned *w = L->way + (size_t)s * L->stride, i, old;
    unsigned m = lt_sim_match(w, L->stride, LT_SIM_TAG, (unsigned)t << 5);
    if (!m)
        return 0;
    i = lt_sim_ctz(m);
    old = w[i];
    lt_sim_age(w, L->stride, (old & LT_SIM_RANK) >> 1, 0, 0);
    w[i] = (old & ~LT_SIM_RANK) | LT_SIM_DIRTY;
    return 1;
}

/* lt_sim_pf from the levels */
static LT_SIM_UNUSED void lt_sim_prefetch_table(void)
{
    int k;
    lt_sim_npf = 0;
    for (k = 1; k < lt_sim_nlevels; k++) {
        const lt_sim_level *L = &lt_sim_lv[k];
        if (L->listed ? 2 * L->sets * L->assoc * sizeof(unsigned) < LT_SIM_PREFETCH_BYTES
                      : !L->sets_pow2 || L->sets * L->stride * sizeof(unsigned) < LT_SIM_PREFETCH_BYTES)
            continue;
        lt_sim_pf[lt_sim_npf].base = L->listed ? L->bucket : L->way;
        lt_sim_pf[lt_sim_npf].hashed = L->listed ? L : NULL;
        lt_sim_pf[lt_sim_npf].shift = L->line_bits;
        lt_sim_pf[lt_sim_npf].stride_bits = L->listed ? 0 : lt_sim_log2(L->stride);
        lt_sim_pf[lt_sim_npf].mask = L->set_mask;
        lt_sim_npf++;
    }
}

/* An address at or beyond lt_sim_small_below: its tag would not fit a small set's word, so
 * every small-set level becomes a listed one, holding the same lines in the same LRU order
 * with the same dirty bits (the model's state is unchanged), for the rest of the run. */
static LT_SIM_NOINLINE LT_SIM_UNUSED void lt_sim_widen(void)
{
    int k;
    unsigned long long s;
    unsigned r, i;
    for (k = 0; k < lt_sim_nlevels; k++) {
        lt_sim_level *L = &lt_sim_lv[k];
        if (L->listed)
            continue;
        lt_sim_list_alloc(L);
        for (s = 0; s < L->sets; s++) {
            const unsigned *w = L->way + s * L->stride;
            for (r = L->assoc; r-- > 0;) {   /* least recent first: each goes in front */
                for (i = 0; i < L->assoc && (w[i] & LT_SIM_RANK) != r << 1; i++)
                    ;
                if (i < L->assoc && (w[i] & LT_SIM_TAG) != LT_SIM_FREE)
                    lt_sim_list_put(L, s, (unsigned)(s * L->assoc) + L->used[s]++,
                                    (unsigned long long)(w[i] >> 5) * L->sets + s, w[i] & LT_SIM_DIRTY);
            }
        }
        free(L->way_block);
        L->way_block = NULL;
        L->way = NULL;
        L->listed = 1;
    }
    lt_sim_small_below = ~0ULL;
    lt_sim_prefetch_table();
}

static LT_SIM_UNUSED void lt_sim_init(int nlevels, const unsigned long long *size, const unsigned *ways,
                                      const unsigned *line, int narrays)
{
    int k;
    unsigned long long i;
    lt_sim_free();
    if (nlevels < 1 || nlevels > LT_SIM_MAX_LEVELS)
        lt_sim_fail("the number of cache levels must be 1 to 8");
    if (narrays < 1)
        narrays = 1;
    for (k = 0; k < nlevels; k++) {
        unsigned long long lines;
        if (line[k] == 0 || (line[k] & (line[k] - 1)))
            lt_sim_fail("a line size must be a power of two");
        if (size[k] == 0 || size[k] % line[k])
            lt_sim_fail("a cache size must be a positive multiple of its line size");
        if (k > 0 && line[k] < line[k - 1])
            lt_sim_fail("line sizes must not decrease towards memory");
        lines = size[k] / line[k];
        if (ways[k] && lines % ways[k])
            lt_sim_fail("the lines of a level cannot be split into sets of its ways");
        if (lines >= LT_SIM_NIL)
            lt_sim_fail("a level has too many lines");
    }
    lt_sim_nlevels = nlevels;
    lt_sim_narrays = narrays;
    lt_sim_depth = (unsigned long long (*)[LT_SIM_MAX_LEVELS + 1])lt_sim_alloc((size_t)narrays,
                                                                                sizeof *lt_sim_depth);
    lt_sim_small_below = ~0ULL;
    for (k = 0; k < nlevels; k++) {
        lt_sim_level *L = &lt_sim_lv[k];
        unsigned long long lines = size[k] / line[k], bytes;
        L->line = line[k];
        L->line_bits = lt_sim_log2(line[k]);
        L->assoc = (ways[k] == 0 || ways[k] == lines) ? (unsigned)lines : ways[k];
        L->sets = lines / L->assoc;
        L->sets_pow2 = (L->sets & (L->sets - 1)) == 0;
        L->set_bits = lt_sim_log2(L->sets);
        L->set_mask = L->sets - 1;
        L->listed = L->assoc > LT_SIM_SMALL_WAYS;
        if (L->listed) {
            lt_sim_list_alloc(L);
            continue;
        }
        /* line / sets < TAG_LIMIT for the addresses below TAG_LIMIT * sets * line (which
         * fits 64 bits for sets * line < 2^37; from 2^37 on, line / sets < 2^26 for every
         * address below 2^63) */
        bytes = L->sets * L->line;
        if (bytes < (1ULL << 37) && LT_SIM_TAG_LIMIT * bytes < lt_sim_small_below)
            lt_sim_small_below = LT_SIM_TAG_LIMIT * bytes;
        L->stride = L->assoc <= 4 ? 4 : L->assoc <= 8 ? 8 : 16;
        L->way_block = lt_sim_alloc((size_t)(L->sets * L->stride) + 16, sizeof(unsigned));
        L->way = (unsigned *)L->way_block + ((64 - ((uintptr_t)L->way_block & 63u)) & 63u) / sizeof(unsigned);
        for (i = 0; i < L->sets; i++) {   /* the ways start free, ranks 0..assoc-1 */
            unsigned r;
            for (r = 0; r < L->stride; r++)
                L->way[i * L->stride + r] = LT_SIM_FREE | (r < L->assoc ? r : 15u) << 1;
        }
    }
    lt_sim_prefetch_table();
    lt_sim_write_bytes = 0;
    lt_sim_chunks = 0;
    lt_sim_progress_on = getenv("LOOPTILE_PROGRESS") != NULL;
    lt_sim_progress_shown = 0;
    lt_sim_qpos = 0;
    for (i = 0; i < LT_SIM_AHEAD; i++)
        lt_sim_qmeta[i] = -1;
    lt_sim_window_left = LT_SIM_WINDOW;
    lt_sim_window_misses = 0;
    lt_sim_windows = 0;
    lt_sim_ahead_on = 0;
    lt_sim_heavy = LT_SIM_TRIAL - 1;
    lt_sim_trial_time[0] = lt_sim_trial_time[1] = 0;
    lt_sim_ahead_best = 1;
    lt_sim_clock = LT_SIM_CLOCK();
}

/* ---- the hierarchy ---- */

/* A dirty line of `bytes` bytes at byte address addr leaves level k-1: it lands
 * in the first level from k on that holds it, or in memory. */
static void lt_sim_writeback(int k, unsigned long long addr, unsigned long long bytes)
{
    for (; k < lt_sim_nlevels; k++) {
        lt_sim_level *L = &lt_sim_lv[k];
        unsigned long long ln = addr >> L->line_bits;
        if (L->listed ? lt_sim_list_mark(L, ln) : lt_sim_small_mark(L, ln))
            return;
    }
    lt_sim_write_bytes += bytes;
}

/* A demand lookup of line ln at level L: HIT, CLEAN or the dirty line it evicted. */
static LT_SIM_INLINE unsigned long long lt_sim_touch(lt_sim_level *L, unsigned long long ln, unsigned dirty)
{
    return L->listed ? lt_sim_list_touch(L, ln, dirty) : lt_sim_small_touch(L, ln, dirty);
}

/* One access: the lookup in L1 and, on a miss, L1's write-back and the read of the line
 * through the levels below.  (Out of line: lt_sim_access is inlined at every access of the
 * instrumented program, this is not.) */
static LT_SIM_NOINLINE LT_SIM_UNUSED void lt_sim_run(unsigned long long addr, int array, unsigned dirty)
{
    int k;
    unsigned long long r = lt_sim_touch(&lt_sim_lv[0], addr >> lt_sim_lv[0].line_bits, dirty);
    if (LT_SIM_LIKELY(r == LT_SIM_HIT)) {
        lt_sim_depth[array][0]++;
        return;
    }
    lt_sim_window_misses++;
    for (k = 1;; k++) {
        lt_sim_level *L = &lt_sim_lv[k - 1];
        if (r != LT_SIM_CLEAN) {   /* level k-1 evicted dirty line r */
            L->writebacks++;
            lt_sim_writeback(k, r << L->line_bits, L->line);
        }
        if (k == lt_sim_nlevels)
            break;
        L = &lt_sim_lv[k];
        r = lt_sim_touch(L, addr >> L->line_bits, 0);
        if (r == LT_SIM_HIT)
            break;
    }
    lt_sim_depth[array][k]++;   /* it missed levels 0..k-1 */
}

static void lt_sim_drain(void);

/* Every LT_SIM_WINDOW accesses: whether to queue the next window's accesses (below).  Not
 * when at most a quarter of this window's missed L1; else as the trial cycle says (at the
 * top: lt_sim_heavy).  And the progress line every 2^LT_SIM_PROGRESS_BITS accesses. */
static LT_SIM_NOINLINE void lt_sim_window_end(void)
{
    int heavy = lt_sim_window_misses * 4 > LT_SIM_WINDOW, on = 0;
    unsigned long long now = LT_SIM_CLOCK();
    if (LT_SIM_TIMED && lt_sim_heavy < 8 && lt_sim_heavy % 4)   /* a timed window ended */
        lt_sim_trial_time[lt_sim_heavy < 4] += now - lt_sim_clock;
    lt_sim_clock = now;
    lt_sim_window_left = LT_SIM_WINDOW;
    lt_sim_window_misses = 0;
    if (heavy) {
        if (LT_SIM_TIMED && lt_sim_heavy == 7)
            lt_sim_ahead_best = lt_sim_trial_time[1] <= lt_sim_trial_time[0];
        lt_sim_heavy = (lt_sim_heavy + 1) % LT_SIM_TRIAL;
        on = !LT_SIM_TIMED || (lt_sim_heavy < 8 ? lt_sim_heavy < 4 : lt_sim_ahead_best);
        if (lt_sim_heavy == 0)
            lt_sim_trial_time[0] = lt_sim_trial_time[1] = 0;
    } else {
        lt_sim_heavy = LT_SIM_TRIAL - 1;   /* the next miss-heavy stretch starts with a trial */
        lt_sim_trial_time[0] = lt_sim_trial_time[1] = 0;
    }
    if (lt_sim_ahead_on && !on)
        lt_sim_drain();
    lt_sim_ahead_on = on;
    if (++lt_sim_windows & ((1ULL << (LT_SIM_PROGRESS_BITS - LT_SIM_WINDOW_BITS)) - 1))
        return;
    lt_sim_chunks++;
    if (lt_sim_progress_on) {
        fprintf(stderr, "\r  simulated %llu million accesses",
                (lt_sim_chunks << LT_SIM_PROGRESS_BITS) / 1000000ULL);
        fflush(stderr);
        lt_sim_progress_shown = 1;
    }
}

/* With the queue on (in a miss-heavy stretch, see lt_sim_window_end), an access waits in a
 * short queue (in order) while the sets it will need below L1 are prefetched, so that the
 * host's memory latency of several misses overlaps; else it runs at once.  Either way the
 * accesses are simulated in their order; lt_sim_finish drains the queue. */
static inline LT_SIM_UNUSED void lt_sim_access(unsigned long long addr, int array, int is_write)
{
    unsigned p;
    unsigned long long old;
    int k, old_meta;
    if (!LT_SIM_LIKELY(addr < lt_sim_small_below))
        lt_sim_widen();
    if (!LT_SIM_LIKELY(--lt_sim_window_left))
        lt_sim_window_end();
    if (!lt_sim_ahead_on) {
        lt_sim_run(addr, array, is_write ? 1u : 0u);
        return;
    }
    /* Prefetch the sets this access will look up below L1.  (This loop stays here: GCC 12
     * at -O2 deletes the calls of a function that does nothing but prefetch.) */
    for (k = 0; LT_SIM_GNU && k < lt_sim_npf; k++) {
        unsigned long long ln = addr >> lt_sim_pf[k].shift;
        if (lt_sim_pf[k].hashed)
            LT_SIM_PREFETCH(lt_sim_pf[k].base + lt_sim_hash(lt_sim_pf[k].hashed, ln));
        else
            LT_SIM_PREFETCH(lt_sim_pf[k].base + ((ln & lt_sim_pf[k].mask) << lt_sim_pf[k].stride_bits));
    }
    p = lt_sim_qpos;
    old = lt_sim_qaddr[p];
    old_meta = lt_sim_qmeta[p];
    lt_sim_qaddr[p] = addr;
    lt_sim_qmeta[p] = array * 2 + (is_write != 0);
    lt_sim_qpos = (p + 1) & (LT_SIM_AHEAD - 1);
    if (old_meta >= 0)
        lt_sim_run(old, old_meta >> 1, (unsigned)old_meta & 1u);
}

static void lt_sim_drain(void)
{
    unsigned i;
    for (i = 0; i < LT_SIM_AHEAD; i++) {
        unsigned p = (lt_sim_qpos + i) & (LT_SIM_AHEAD - 1);
        if (lt_sim_qmeta[p] >= 0)
            lt_sim_run(lt_sim_qaddr[p], lt_sim_qmeta[p] >> 1, (unsigned)lt_sim_qmeta[p] & 1u);
        lt_sim_qmeta[p] = -1;
    }
}

static LT_SIM_UNUSED void lt_sim_finish(void)
{
    int k;
    unsigned long long i, n;
    unsigned j;
    lt_sim_drain();
    for (k = 0; k < lt_sim_nlevels; k++) {
        lt_sim_level *L = &lt_sim_lv[k];
        if (!L->listed) {
            for (i = 0; i < L->sets; i++) {
                for (j = 0; j < L->assoc; j++) {
                    unsigned *w = &L->way[i * L->stride + j];
                    if (!(*w & LT_SIM_DIRTY))   /* clean or free */
                        continue;
                    *w &= ~LT_SIM_DIRTY;
                    L->writebacks++;
                    lt_sim_writeback(k + 1, ((unsigned long long)(*w >> 5) * L->sets + i) << L->line_bits, L->line);
                }
            }
            continue;
        }
        n = L->sets * L->assoc;
        for (i = 0; i < n; i++) {
            /* node i is in use iff its index within its set is below used[set] */
            if ((unsigned)(i % L->assoc) >= L->used[i / L->assoc] || !L->node[i].dirty)
                continue;
            L->node[i].dirty = 0;
            L->writebacks++;
            lt_sim_writeback(k + 1, L->node[i].tag << L->line_bits, L->line);
        }
    }
    if (lt_sim_progress_shown) {
        fputc('\n', stderr);
        lt_sim_progress_shown = 0;
    }
}

static LT_SIM_UNUSED void lt_sim_report(FILE *out)
{
    int k, a, d;
    unsigned long long read_lines = 0;
    fputs("{\"levels\": [", out);
    for (k = 0; k < lt_sim_nlevels; k++) {
        unsigned long long acc = 0, hit = 0;
        for (a = 0; a < lt_sim_narrays; a++) {
            for (d = k; d <= lt_sim_nlevels; d++)
                acc += lt_sim_depth[a][d];
            hit += lt_sim_depth[a][k];
        }
        fprintf(out, "%s{\"accesses\": %llu, \"hits\": %llu, \"misses\": %llu, \"writebacks\": %llu, \"arrays\": [",
                k ? ", " : "", acc, hit, acc - hit, lt_sim_lv[k].writebacks);
        for (a = 0; a < lt_sim_narrays; a++) {
            unsigned long long aacc = 0;
            for (d = k; d <= lt_sim_nlevels; d++)
                aacc += lt_sim_depth[a][d];
            fprintf(out, "%s{\"accesses\": %llu, \"hits\": %llu, \"misses\": %llu}", a ? ", " : "",
                    aacc, lt_sim_depth[a][k], aacc - lt_sim_depth[a][k]);
        }
        fputs("]}", out);
    }
    for (a = 0; a < lt_sim_narrays; a++)
        read_lines += lt_sim_depth[a][lt_sim_nlevels];
    fprintf(out, "], \"memory\": {\"read_bytes\": %llu, \"write_bytes\": %llu}}\n",
            read_lines * lt_sim_lv[lt_sim_nlevels - 1].line, lt_sim_write_bytes);
    fflush(out);
}

#endif /* LOOPTILE_CACHESIM_H */
