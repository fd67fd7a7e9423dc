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
 * Speed and memory: a level of at most LT_SIM_SMALL_WAYS ways keeps each set
 * as a small array in most-recently-used-first order (move to front); a fully
 * associative or wider level keeps a hash table plus one doubly linked LRU list
 * per set (O(1) per access).  In a stretch where more than a quarter of the
 * accesses miss L1 (decided per 1024 accesses), accesses wait in a queue of 16,
 * in order, while the sets they need below L1 are prefetched, so that the host's
 * memory latency overlaps; the counts do not depend on it.  Memory depends on the
 * geometry only, never on the length of the trace.  With LOOPTILE_PROGRESS in the environment, a progress
 * line goes to stderr every 2^26 accesses and a newline at lt_sim_finish.
 */
#ifndef LOOPTILE_CACHESIM_H
#define LOOPTILE_CACHESIM_H

#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#if defined(__GNUC__) || defined(__clang__)
#define LT_SIM_UNUSED __attribute__((unused))
#define LT_SIM_NOINLINE __attribute__((noinline))
#define LT_SIM_LIKELY(x) __builtin_expect(!!(x), 1)
#else
#define LT_SIM_UNUSED
#define LT_SIM_NOINLINE
#define LT_SIM_LIKELY(x) (x)
#endif

#define LT_SIM_MAX_LEVELS 8
#define LT_SIM_SMALL_WAYS 16u
#define LT_SIM_EMPTY (~0ULL)     /* a free way of a small set */
#define LT_SIM_NIL 0xffffffffu   /* end of a list or hash chain */
#define LT_SIM_PROGRESS_BITS 26

typedef struct {
    unsigned long long accesses, misses;
} lt_sim_counts;

typedef struct {
    unsigned long long tag;      /* line number */
    unsigned prev, next;         /* the set's LRU list, most recent first */
    unsigned hnext;              /* next node of the same hash bucket */
    unsigned dirty;
} lt_sim_node;

typedef struct {
    unsigned line_bits;
    unsigned assoc;
    int listed;                  /* 0: small sets (array), 1: hash + lists */
    int sets_pow2;
    unsigned long long line, sets, set_mask;
    /* small sets: sets * assoc entries, most recent first, (line << 1) | dirty */
    unsigned long long *way;
    /* listed sets */
    lt_sim_node *node;           /* set s owns nodes s*assoc .. s*assoc+assoc-1 */
    unsigned *head, *tail, *used;
    unsigned *bucket;
    unsigned hash_shift;
    unsigned long long writebacks;
    lt_sim_counts *arrays;       /* per array: demand accesses and misses */
} lt_sim_level;

static lt_sim_level lt_sim_lv[LT_SIM_MAX_LEVELS];
static int lt_sim_nlevels;
static int lt_sim_narrays;
static unsigned long long lt_sim_read_bytes, lt_sim_write_bytes;
static unsigned long long lt_sim_countdown = 1ULL << LT_SIM_PROGRESS_BITS;
static unsigned long long lt_sim_chunks;
static int lt_sim_progress_on, lt_sim_progress_shown;
#define LT_SIM_AHEAD 16u         /* accesses queued while their sets are prefetched (power of two) */
static unsigned long long lt_sim_qaddr[LT_SIM_AHEAD];
static int lt_sim_qmeta[LT_SIM_AHEAD];   /* array * 2 + is_write; -1: empty */
static unsigned lt_sim_qpos;
#define LT_SIM_WINDOW 1024u
static unsigned lt_sim_window_left = LT_SIM_WINDOW, lt_sim_window_misses;
static int lt_sim_ahead_on;

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
        free(L->way); free(L->node); free(L->head); free(L->tail); free(L->used);
        free(L->bucket); free(L->arrays);
        memset(L, 0, sizeof *L);
    }
    lt_sim_nlevels = 0;
}

static LT_SIM_UNUSED unsigned lt_sim_log2(unsigned long long x)
{
    unsigned b = 0;
    while ((1ULL << b) < x)
        b++;
    return b;
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
    for (k = 0; k < nlevels; k++) {
        lt_sim_level *L = &lt_sim_lv[k];
        unsigned long long lines = size[k] / line[k];
        L->line = line[k];
        L->line_bits = lt_sim_log2(line[k]);
        L->assoc = (ways[k] == 0 || ways[k] == lines) ? (unsigned)lines : ways[k];
        L->sets = lines / L->assoc;
        L->sets_pow2 = (L->sets & (L->sets - 1)) == 0;
        L->set_mask = L->sets - 1;
        L->listed = L->assoc > LT_SIM_SMALL_WAYS;
        L->arrays = (lt_sim_counts *)lt_sim_alloc((size_t)narrays, sizeof(lt_sim_counts));
        if (!L->listed) {
            L->way = (unsigned long long *)lt_sim_alloc((size_t)lines, sizeof(unsigned long long));
            for (i = 0; i < lines; i++)
                L->way[i] = LT_SIM_EMPTY;
        } else {
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
    }
    lt_sim_read_bytes = lt_sim_write_bytes = 0;
    lt_sim_countdown = 1ULL << LT_SIM_PROGRESS_BITS;
    lt_sim_chunks = 0;
    lt_sim_progress_on = getenv("LOOPTILE_PROGRESS") != NULL;
    lt_sim_progress_shown = 0;
    lt_sim_qpos = 0;
    for (i = 0; i < LT_SIM_AHEAD; i++)
        lt_sim_qmeta[i] = -1;
    lt_sim_window_left = LT_SIM_WINDOW;
    lt_sim_window_misses = 0;
    lt_sim_ahead_on = 0;
}

static inline unsigned long long lt_sim_set(const lt_sim_level *L, unsigned long long ln)
{
    return L->sets_pow2 ? (ln & L->set_mask) : (ln % L->sets);
}

/* ---- small sets: an array per set, most recently used first ---- */

/* Look ln up; a hit moves it to the front and ORs in dirty.  A miss puts it in
 * front and returns the dirty line pushed out of the set in *victim (or EMPTY). */
static inline int lt_sim_small_touch(lt_sim_level *L, unsigned long long ln, unsigned dirty,
                                     unsigned long long *victim)
{
    unsigned long long *w = L->way + lt_sim_set(L, ln) * L->assoc;
    unsigned long long key = (ln << 1) | 1u, e;
    unsigned i, n = L->assoc;
    if ((w[0] | 1u) == key) {
        w[0] |= dirty;
        return 1;
    }
    for (i = 1; i < n; i++) {
        if ((w[i] | 1u) == key) {
            e = w[i] | dirty;
            for (; i > 0; i--)
                w[i] = w[i - 1];
            w[0] = e;
            return 1;
        }
    }
    e = w[n - 1];
    *victim = (e != LT_SIM_EMPTY && (e & 1u)) ? (e >> 1) : LT_SIM_EMPTY;
    for (i = n - 1; i > 0; i--)
        w[i] = w[i - 1];
    w[0] = (ln << 1) | dirty;
    return 0;
}

/* A write-back into a small-set level: dirty and most recent if present. */
static int lt_sim_small_mark(lt_sim_level *L, unsigned long long ln)
{
    unsigned long long *w = L->way + lt_sim_set(L, ln) * L->assoc;
    unsigned long long key = (ln << 1) | 1u, e;
    unsigned i;
    for (i = 0; i < L->assoc; i++) {
        if ((w[i] | 1u) == key) {
            e = w[i] | 1u;
            for (; i > 0; i--)
                w[i] = w[i - 1];
            w[0] = e;
            return 1;
        }
    }
    return 0;
}

/* ---- listed sets: hash table + one LRU list per set ---- */

static inline unsigned lt_sim_hash(const lt_sim_level *L, unsigned long long ln)
{
    return (unsigned)((ln * 0x9E3779B97F4A7C15ULL) >> L->hash_shift);
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

static int lt_sim_list_touch(lt_sim_level *L, unsigned long long ln, unsigned dirty, unsigned long long *victim)
{
    unsigned long long s = lt_sim_set(L, ln);
    unsigned n = lt_sim_find(L, ln), h;
    if (n != LT_SIM_NIL) {
        L->node[n].dirty |= dirty;
        if (L->head[s] != n) {
            lt_sim_unlink(L, s, n);
            lt_sim_push_front(L, s, n);
        }
        return 1;
    }
    *victim = LT_SIM_EMPTY;
    if (L->used[s] < L->assoc) {
        n = (unsigned)(s * L->assoc) + L->used[s]++;
    } else {
        n = L->tail[s];
        if (L->node[n].dirty)
            *victim = L->node[n].tag;
        lt_sim_unlink(L, s, n);
        lt_sim_unhash(L, n);
    }
    L->node[n].tag = ln;
    L->node[n].dirty = dirty;
    h = lt_sim_hash(L, ln);
    L->node[n].hnext = L->bucket[h];
    L->bucket[h] = n;
    lt_sim_push_front(L, s, n);
    return 0;
}

static int lt_sim_list_mark(lt_sim_level *L, unsigned long long ln)
{
    unsigned n = lt_sim_find(L, ln);
    unsigned long long s;
    if (n == LT_SIM_NIL)
        return 0;
    s = lt_sim_set(L, ln);
    L->node[n].dirty = 1;
    if (L->head[s] != n) {
        lt_sim_unlink(L, s, n);
        lt_sim_push_front(L, s, n);
    }
    return 1;
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

static inline int lt_sim_touch(lt_sim_level *L, unsigned long long ln, unsigned dirty, unsigned long long *victim)
{
    *victim = LT_SIM_EMPTY;
    return L->listed ? lt_sim_list_touch(L, ln, dirty, victim) : lt_sim_small_touch(L, ln, dirty, victim);
}

static LT_SIM_UNUSED void lt_sim_tick(void)
{
    lt_sim_countdown = 1ULL << LT_SIM_PROGRESS_BITS;
    lt_sim_chunks++;
    if (lt_sim_progress_on) {
        fprintf(stderr, "\r  simulated %llu million accesses",
                (lt_sim_chunks << LT_SIM_PROGRESS_BITS) / 1000000ULL);
        fflush(stderr);
        lt_sim_progress_shown = 1;
    }
}

/* Level 0 missed (the line is already allocated there, its victim in victim):
 * the write-back, then the read of the line through the levels below. */
static LT_SIM_NOINLINE void lt_sim_miss(unsigned long long addr, int array, unsigned long long victim)
{
    int k = 0;
    lt_sim_window_misses++;
    for (;;) {
        lt_sim_level *L = &lt_sim_lv[k];
        L->arrays[array].misses++;
        if (victim != LT_SIM_EMPTY) {
            L->writebacks++;
            lt_sim_writeback(k + 1, victim << L->line_bits, L->line);
        }
        if (++k == lt_sim_nlevels) {
            lt_sim_read_bytes += L->line;
            return;
        }
        L = &lt_sim_lv[k];
        L->arrays[array].accesses++;
        if (lt_sim_touch(L, addr >> L->line_bits, 0, &victim))
            return;
    }
}

static inline void lt_sim_run(unsigned long long addr, int array, unsigned dirty)
{
    lt_sim_level *L = &lt_sim_lv[0];
    unsigned long long victim;
    L->arrays[array].accesses++;
    if (LT_SIM_LIKELY(lt_sim_touch(L, addr >> L->line_bits, dirty, &victim)))
        return;
    lt_sim_miss(addr, array, victim);
}

static void lt_sim_drain(void);

/* Every LT_SIM_WINDOW accesses: queue the next window's accesses (below) when more
 * than a quarter of this window's missed L1, else run them at once. */
static LT_SIM_NOINLINE void lt_sim_window_end(void)
{
    int on = lt_sim_window_misses * 4 > LT_SIM_WINDOW;
    lt_sim_window_left = LT_SIM_WINDOW;
    lt_sim_window_misses = 0;
    if (lt_sim_ahead_on && !on)
        lt_sim_drain();
    lt_sim_ahead_on = on;
}

/* In a miss-heavy stretch, accesses wait in a short queue (in order) while the sets
 * they will need below L1 are prefetched, so that the host's memory latency of
 * several misses overlaps; in a hit-heavy stretch they run at once (the prefetches
 * would cost more than they save).  Either way the accesses are simulated in their
 * order; lt_sim_finish drains the queue. */
static inline LT_SIM_UNUSED void lt_sim_access(unsigned long long addr, int array, int is_write)
{
    unsigned p;
    unsigned long long old;
    int k, old_meta;
    if (!LT_SIM_LIKELY(--lt_sim_countdown))
        lt_sim_tick();
    if (!LT_SIM_LIKELY(--lt_sim_window_left))
        lt_sim_window_end();
    if (!lt_sim_ahead_on) {
        lt_sim_run(addr, array, is_write ? 1u : 0u);
        return;
    }
#if defined(__GNUC__) || defined(__clang__)
    for (k = 1; k < lt_sim_nlevels; k++) {
        const lt_sim_level *L = &lt_sim_lv[k];
        unsigned long long ln = addr >> L->line_bits;
        if (!L->sets_pow2)
            continue;
        if (L->listed) {
            __builtin_prefetch(&L->bucket[lt_sim_hash(L, ln)]);
        } else {
            const unsigned long long *w = L->way + (ln & L->set_mask) * L->assoc;
            __builtin_prefetch(w);
            __builtin_prefetch(w + L->assoc - 1);
        }
    }
#else
    (void)k;
#endif
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
    lt_sim_drain();
    for (k = 0; k < lt_sim_nlevels; k++) {
        lt_sim_level *L = &lt_sim_lv[k];
        n = L->sets * L->assoc;
        for (i = 0; i < n; i++) {
            unsigned long long ln;
            if (!L->listed) {
                if (L->way[i] == LT_SIM_EMPTY || !(L->way[i] & 1u))
                    continue;
                L->way[i] &= ~1ULL;
                ln = L->way[i] >> 1;
            } else {
                /* node i is in use iff its index within its set is below used[set] */
                if ((unsigned)(i % L->assoc) >= L->used[i / L->assoc] || !L->node[i].dirty)
                    continue;
                L->node[i].dirty = 0;
                ln = L->node[i].tag;
            }
            L->writebacks++;
            lt_sim_writeback(k + 1, ln << L->line_bits, L->line);
        }
    }
    if (lt_sim_progress_shown) {
        fputc('\n', stderr);
        lt_sim_progress_shown = 0;
    }
}

static LT_SIM_UNUSED void lt_sim_report(FILE *out)
{
    int k, a;
    fputs("{\"levels\": [", out);
    for (k = 0; k < lt_sim_nlevels; k++) {
        const lt_sim_level *L = &lt_sim_lv[k];
        unsigned long long acc = 0, miss = 0;
        for (a = 0; a < lt_sim_narrays; a++) {
            acc += L->arrays[a].accesses;
            miss += L->arrays[a].misses;
        }
        fprintf(out, "%s{\"accesses\": %llu, \"hits\": %llu, \"misses\": %llu, \"writebacks\": %llu, \"arrays\": [",
                k ? ", " : "", acc, acc - miss, miss, L->writebacks);
        for (a = 0; a < lt_sim_narrays; a++)
            fprintf(out, "%s{\"accesses\": %llu, \"hits\": %llu, \"misses\": %llu}", a ? ", " : "",
                    L->arrays[a].accesses, L->arrays[a].accesses - L->arrays[a].misses, L->arrays[a].misses);
        fputs("]}", out);
    }
    fprintf(out, "], \"memory\": {\"read_bytes\": %llu, \"write_bytes\": %llu}}\n", lt_sim_read_bytes,
            lt_sim_write_bytes);
    fflush(out);
}

#endif /* LOOPTILE_CACHESIM_H */
