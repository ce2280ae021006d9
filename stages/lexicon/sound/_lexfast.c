/* Compiled kernels of the lexicon stage: phone n-gram retrieval, feature-weighted alignment, the
   graphone beam search of the G2P model, the word spans of an N-best, the scoring of span/form
   pairs, and the pooling of their evidence over the N-best (stages/lexicon/match.py _pool_python).

   Each gives the same results as the numpy or Python code it stands in for (stages/phone_index.py
   PhoneIndex._search_numpy, stages/phonetics.py _batch_alignment_cost_numpy, stages/g2p.py
   G2PModel._decode_numpy, stages/lexicon_match.py _word_spans_python), bit for bit: every float
   operation is done in the same precision and order, and the module is built with -ffp-contract=off so no multiply-add is fused. Arrays come
   in and go out through the buffer protocol (the typed wrappers in Python allocate them), so the
   build needs no numpy headers. The GIL is held throughout: a call takes well under a
   millisecond, and the index's scratch counters may then be shared by every caller. */

#define PY_SSIZE_T_CLEAN
#include <Python.h>
#include <math.h>
#include <stdint.h>
#include <stdlib.h>
#include <string.h>

#define UNKNOWN (-1)
#define DROPPED (-2)

static int check_size(const Py_buffer *view, Py_ssize_t items, Py_ssize_t itemsize, const char *name) {
    if (view->len < items * itemsize) {
        PyErr_Format(PyExc_ValueError, "%s holds %zd bytes, needs %zd", name, view->len, items * itemsize);
        return -1;
    }
    return 0;
}

/* Both arguments as fast sequences (new references), or -1 with an error set and neither held. */
static int fast_sequences(PyObject *a, PyObject *b, const char *a_error, const char *b_error, PyObject **fast_a,
                          PyObject **fast_b) {
    *fast_a = PySequence_Fast(a, a_error);
    if (*fast_a == NULL)
        return -1;
    *fast_b = PySequence_Fast(b, b_error);
    if (*fast_b == NULL) {
        Py_CLEAR(*fast_a);
        return -1;
    }
    return 0;
}

/* Where a probe of an open-addressing table of `mask + 1` slots starts for value (Fibonacci hashing). */
static inline Py_ssize_t first_slot(uint64_t value, Py_ssize_t mask) {
    return (Py_ssize_t)((value * 0x9E3779B97F4A7C15ull) >> 32) & mask;
}

/* The slot of a set of non-negative values (empty slots hold -1) that holds value, or the empty
   slot where it would go. */
static inline Py_ssize_t slot_of(const int64_t *slots, Py_ssize_t mask, int64_t value) {
    Py_ssize_t at = first_slot((uint64_t)value, mask);
    while (slots[at] != -1 && slots[at] != value)
        at = (at + 1) & mask;
    return at;
}

/* Adds value to such a set; whether it was new. */
static inline int add_once(int64_t *slots, Py_ssize_t mask, int64_t value) {
    Py_ssize_t at = slot_of(slots, mask, value);
    if (slots[at] == value)
        return 0;
    slots[at] = value;
    return 1;
}

/* Phone codes of one encoded string (one character per phone), each checked to lie in [0, limit). */
static int read_codes(PyObject *text, int32_t *out, Py_ssize_t length, int32_t char_base, int32_t limit) {
    int kind = PyUnicode_KIND(text);
    const void *data = PyUnicode_DATA(text);
    for (Py_ssize_t i = 0; i < length; i++) {
        int32_t code = (int32_t)PyUnicode_READ(kind, data, i) - char_base;
        if (code < 0 || code >= limit) {
            PyErr_Format(PyExc_ValueError, "character %zd of a phone string is not an encoded phone", i);
            return -1;
        }
        out[i] = code;
    }
    return 0;
}

static int fetch_strings(PyObject *sequence, PyObject **fast, Py_ssize_t *count, Py_ssize_t *longest) {
    *fast = PySequence_Fast(sequence, "expected a sequence of str");
    if (*fast == NULL)
        return -1;
    *count = PySequence_Fast_GET_SIZE(*fast);
    *longest = 0;
    PyObject **items = PySequence_Fast_ITEMS(*fast);
    for (Py_ssize_t i = 0; i < *count; i++) {
        if (!PyUnicode_Check(items[i])) {
            PyErr_SetString(PyExc_TypeError, "expected a sequence of str");
            Py_CLEAR(*fast);
            return -1;
        }
        Py_ssize_t length = PyUnicode_GET_LENGTH(items[i]);
        if (length > *longest)
            *longest = length;
    }
    return 0;
}

typedef struct {
    int32_t item;
    float score;
} Candidate;

/* Whether a ranks before b: higher score, then lower item (the numpy path's stable sort). */
static inline int ranks_before(Candidate a, Candidate b) {
    return a.score > b.score || (a.score == b.score && a.item < b.item);
}

PyDoc_STRVAR(search_doc,
"search(queries, lookup, offsets, postings, sizes, counts, touched, least_size, k, min_score,\n"
"       out_query, out_item, out_score, char_base, phones, base, offset4, recast=None) -> int\n\n"
"Up to k items per query by Dice score of shared phone 3- and 4-grams; writes the hits into\n"
"the out buffers grouped by query, best first, and returns how many. counts and touched are\n"
"int32 scratch arrays of one element per indexed string; counts must be zero and is left so.\n"
"With recast (int32, one element per phone of the queries' alphabet), each query phone is read\n"
"as recast[phone], or left out where that is negative: the search of an index over a smaller\n"
"alphabet (broad classes, consonant skeleton) without the recast strings being made first.");

static PyObject *search(PyObject *self, PyObject *args) {
    PyObject *queries, *recast_o = Py_None;
    Py_buffer lookup_b, offsets_b, postings_b, sizes_b, counts_b, touched_b, oq_b, oi_b, os_b, recast_b = {0};
    double least_size, min_score;
    Py_ssize_t k;
    int char_base, phones, base;
    long long offset4;
    if (!PyArg_ParseTuple(args, "Oy*y*y*y*w*w*dndw*w*w*iiiL|O", &queries, &lookup_b, &offsets_b, &postings_b,
                          &sizes_b, &counts_b, &touched_b, &least_size, &k, &min_score, &oq_b, &oi_b, &os_b,
                          &char_base, &phones, &base, &offset4, &recast_o))
        return NULL;
    PyObject *result = NULL, *fast = NULL;
    int64_t *grams = NULL, *slots = NULL;
    int32_t *codes = NULL, *columns = NULL;
    Candidate *best = NULL;
    Py_ssize_t count, longest;
    const int32_t *recast = NULL;
    Py_ssize_t recast_count = 0;
    if (recast_o != Py_None) {
        if (PyObject_GetBuffer(recast_o, &recast_b, PyBUF_SIMPLE) < 0) {
            recast_b.obj = NULL;
            goto done;
        }
        recast = recast_b.buf;
        recast_count = recast_b.len / 4;
    }
    if (fetch_strings(queries, &fast, &count, &longest) < 0)
        goto done;
    Py_ssize_t table = lookup_b.len / 4, strings = sizes_b.len / 4, columns_count = offsets_b.len / 8 - 1;
    Py_ssize_t capacity = oq_b.len / 4;
    if (check_size(&counts_b, strings, 4, "counts") < 0 || check_size(&touched_b, strings, 4, "touched") < 0 ||
        check_size(&oi_b, capacity, 4, "out_item") < 0 || check_size(&os_b, capacity, 4, "out_score") < 0)
        goto done;
    if (k < 0 || capacity < count * k || columns_count < 0 || phones + 2 > base) {
        PyErr_SetString(PyExc_ValueError, "search: inconsistent sizes");
        goto done;
    }
    const int32_t *lookup = lookup_b.buf, *postings = postings_b.buf;
    const int64_t *offsets = offsets_b.buf;
    const float *sizes = sizes_b.buf;
    int32_t *counts = counts_b.buf, *touched = touched_b.buf;
    int32_t *out_query = oq_b.buf, *out_item = oi_b.buf;
    float *out_score = os_b.buf;
    Py_ssize_t postings_count = postings_b.len / 4;
    codes = malloc(sizeof(int32_t) * (size_t)(longest + 2));
    grams = malloc(sizeof(int64_t) * (size_t)(2 * (longest + 2)));
    columns = malloc(sizeof(int32_t) * (size_t)(2 * (longest + 2)));
    best = malloc(sizeof(Candidate) * (size_t)(k + 1));
    Py_ssize_t slot_count = 16;
    while (slot_count < 4 * (longest + 2))
        slot_count *= 2; /* at most a half-full set: short probes */
    slots = malloc(sizeof(int64_t) * (size_t)slot_count);
    if (!codes || !grams || !columns || !best || !slots) {
        PyErr_NoMemory();
        goto done;
    }
    /* As in numpy with a Python float next to float32 arrays: the float is rounded to float32 first. */
    const float min_f = (float)min_score, least_f = (float)least_size, margin_f = (float)1e-3;
    PyObject **items = PySequence_Fast_ITEMS(fast);
    Py_ssize_t written = 0;
    for (Py_ssize_t q = 0; q < count; q++) {
        Py_ssize_t length = PyUnicode_GET_LENGTH(items[q]);
        codes[0] = phones; /* start mark */
        if (recast != NULL) {
            if (read_codes(items[q], codes + 1, length, char_base, (int32_t)recast_count) < 0)
                goto done;
            Py_ssize_t kept_codes = 0;
            for (Py_ssize_t i = 1; i <= length; i++) {
                int32_t mapped = recast[codes[i]];
                if (mapped < 0)
                    continue; /* a phone the smaller alphabet leaves out */
                if (mapped >= phones) {
                    PyErr_SetString(PyExc_ValueError, "search: recast points outside the alphabet");
                    goto done;
                }
                codes[++kept_codes] = mapped;
            }
            length = kept_codes;
        } else if (read_codes(items[q], codes + 1, length, char_base, phones) < 0) {
            goto done;
        }
        codes[length + 1] = phones + 1; /* end mark */
        Py_ssize_t padded = length + 2, made = 0;
        for (int n = 3; n <= 4; n++) {
            for (Py_ssize_t i = 0; i + n <= padded; i++) {
                int64_t value = 0;
                for (int j = 0; j < n; j++)
                    value = value * base + codes[i + j];
                grams[made++] = value + (n == 4 ? offset4 : 0);
            }
        }
        Py_ssize_t mask = 16 - 1;
        while (mask + 1 < 2 * made)
            mask = 2 * mask + 1;
        memset(slots, 0xff, sizeof(int64_t) * (size_t)(mask + 1)); /* every slot -1: empty */
        Py_ssize_t kept = 0, known = 0;
        for (Py_ssize_t i = 0; i < made; i++) {
            if (!add_once(slots, mask, grams[i]))
                continue; /* a set of n-grams: each counts once */
            if (grams[i] < 0 || grams[i] >= table) {
                PyErr_SetString(PyExc_ValueError, "search: n-gram outside the lookup table");
                goto done;
            }
            int32_t column = lookup[grams[i]];
            if (column != DROPPED)
                kept++;
            if (column >= 0) {
                if (column >= columns_count || offsets[column + 1] > postings_count) {
                    PyErr_SetString(PyExc_ValueError, "search: lookup points past the postings");
                    goto done;
                }
                columns[known++] = column;
            }
        }
        Py_ssize_t distinct = 0;
        for (Py_ssize_t c = 0; c < known; c++) {
            for (int64_t p = offsets[columns[c]]; p < offsets[columns[c] + 1]; p++) {
                int32_t item = postings[p];
                if (item < 0 || item >= strings) {
                    PyErr_SetString(PyExc_ValueError, "search: posting outside the index");
                    goto done;
                }
                if (counts[item]++ == 0)
                    touched[distinct++] = item;
            }
        }
        const float query_size = (float)kept;
        /* Dice >= min_score needs 2 shared >= min_score (|A| + least |B|); the same float32
           steps as the numpy bound, compared in double as numpy compares int64 with float32. */
        const float bound = min_f * (query_size + least_f) / 2.0f - margin_f;
        Py_ssize_t held = 0;
        for (Py_ssize_t t = 0; t < distinct; t++) {
            int32_t item = touched[t];
            int32_t shared = counts[item];
            counts[item] = 0;
            if ((double)shared < (double)bound)
                continue;
            float denominator = query_size + sizes[item];
            if (!(denominator >= 1.0f))
                denominator = 1.0f;
            Candidate c = {item, (float)(2.0 * (double)shared / (double)denominator)};
            if (!(c.score >= min_f))
                continue;
            /* insertion into the k best so far, kept in rank order */
            Py_ssize_t at = held;
            if (held == k) {
                if (k == 0 || !ranks_before(c, best[k - 1]))
                    continue;
                at = k - 1;
            } else {
                held++;
            }
            while (at > 0 && ranks_before(c, best[at - 1])) {
                best[at] = best[at - 1];
                at--;
            }
            best[at] = c;
        }
        for (Py_ssize_t i = 0; i < held; i++) {
            out_query[written] = (int32_t)q;
            out_item[written] = best[i].item;
            out_score[written] = best[i].score;
            written++;
        }
    }
    result = PyLong_FromSsize_t(written);
done:
    if (result == NULL)
        memset(counts_b.buf, 0, (size_t)counts_b.len); /* an error may leave counts half taken */
    free(codes);
    free(grams);
    free(slots);
    free(columns);
    free(best);
    Py_XDECREF(fast);
    PyBuffer_Release(&lookup_b);
    PyBuffer_Release(&offsets_b);
    PyBuffer_Release(&postings_b);
    PyBuffer_Release(&sizes_b);
    PyBuffer_Release(&counts_b);
    PyBuffer_Release(&touched_b);
    PyBuffer_Release(&oq_b);
    PyBuffer_Release(&oi_b);
    PyBuffer_Release(&os_b);
    if (recast_b.obj != NULL)
        PyBuffer_Release(&recast_b);
    return result;
}

/* The least cost of the feature-weighted alignment of codes xs (n) with ys (m) in float32, in the
   order of the numpy batch version; cum, row and next hold m + 1 floats each. */
static inline float align_codes(const int32_t *xs, Py_ssize_t n, const int32_t *ys, Py_ssize_t m, const float *sub,
                                const float *inserted, const float *deleted, Py_ssize_t stride, float *cum,
                                float *row, float *next) {
    /* cum[j]: cost of leaving the first j phones of ys unmatched, summed left to right */
    cum[0] = 0.0f;
    for (Py_ssize_t j = 0; j < m; j++)
        cum[j + 1] = cum[j] + deleted[ys[j]];
    memcpy(row, cum, sizeof(float) * (size_t)(m + 1));
    for (Py_ssize_t i = 0; i < n; i++) {
        const float drop = inserted[xs[i]];
        const float *costs = sub + (Py_ssize_t)xs[i] * stride;
        /* Fill from the row above (delete or substitute), then resolve insertions along the
           row by a running minimum of (value - cum), as the vectorised version does. */
        float running = (row[0] + drop) - cum[0];
        next[0] = running + cum[0];
        for (Py_ssize_t j = 1; j <= m; j++) {
            float gone = row[j] + drop;
            float substituted = row[j - 1] + costs[ys[j - 1]];
            float value = substituted < gone ? substituted : gone;
            float lowered = value - cum[j];
            if (lowered < running)
                running = lowered;
            next[j] = running + cum[j];
        }
        float *swap = row;
        row = next;
        next = swap;
    }
    return row[m];
}

PyDoc_STRVAR(align_doc,
"alignment_costs(a, b, substitution, insertion, deletion, stride, char_base, out) -> None\n\n"
"Least total cost of turning a[i] into b[i] for every i, written to the float32 buffer out.\n"
"substitution is a float32 stride x stride matrix (row: phone of a, column: phone of b);\n"
"insertion (a phone of a left over) and deletion (a phone of b left over) are float32 vectors\n"
"of stride costs, indexed by phone code; the arithmetic is float32 in the order of the numpy\n"
"batch version.");

static PyObject *alignment_costs(PyObject *self, PyObject *args) {
    PyObject *a, *b;
    Py_buffer sub_b, ins_b, del_b, out_b;
    int stride, char_base;
    if (!PyArg_ParseTuple(args, "OOy*y*y*iiw*", &a, &b, &sub_b, &ins_b, &del_b, &stride, &char_base, &out_b))
        return NULL;
    PyObject *result = NULL, *fast_a = NULL, *fast_b = NULL;
    int32_t *xs = NULL, *ys = NULL;
    float *cum = NULL, *row = NULL, *next = NULL;
    Py_ssize_t count_a, count_b, longest_a, longest_b;
    if (fetch_strings(a, &fast_a, &count_a, &longest_a) < 0 || fetch_strings(b, &fast_b, &count_b, &longest_b) < 0)
        goto done;
    if (count_a != count_b || stride <= 0) {
        PyErr_SetString(PyExc_ValueError, "alignment_costs: a and b must have the same length");
        goto done;
    }
    if (check_size(&sub_b, (Py_ssize_t)stride * stride, 4, "substitution") < 0 ||
        check_size(&ins_b, stride, 4, "insertion") < 0 || check_size(&del_b, stride, 4, "deletion") < 0 ||
        check_size(&out_b, count_a, 4, "out") < 0)
        goto done;
    const float *sub = sub_b.buf, *inserted = ins_b.buf, *deleted = del_b.buf;
    float *out = out_b.buf;
    xs = malloc(sizeof(int32_t) * (size_t)(longest_a + 1));
    ys = malloc(sizeof(int32_t) * (size_t)(longest_b + 1));
    cum = malloc(sizeof(float) * (size_t)(longest_b + 1));
    row = malloc(sizeof(float) * (size_t)(longest_b + 1));
    next = malloc(sizeof(float) * (size_t)(longest_b + 1));
    if (!xs || !ys || !cum || !row || !next) {
        PyErr_NoMemory();
        goto done;
    }
    PyObject **items_a = PySequence_Fast_ITEMS(fast_a), **items_b = PySequence_Fast_ITEMS(fast_b);
    for (Py_ssize_t p = 0; p < count_a; p++) {
        Py_ssize_t n = PyUnicode_GET_LENGTH(items_a[p]), m = PyUnicode_GET_LENGTH(items_b[p]);
        if (read_codes(items_a[p], xs, n, char_base, stride) < 0 || read_codes(items_b[p], ys, m, char_base, stride) < 0)
            goto done;
        out[p] = align_codes(xs, n, ys, m, sub, inserted, deleted, stride, cum, row, next);
    }
    Py_INCREF(Py_None);
    result = Py_None;
done:
    free(xs);
    free(ys);
    free(cum);
    free(row);
    free(next);
    Py_XDECREF(fast_a);
    Py_XDECREF(fast_b);
    PyBuffer_Release(&sub_b);
    PyBuffer_Release(&ins_b);
    PyBuffer_Release(&del_b);
    PyBuffer_Release(&out_b);
    return result;
}

#define MAX_ORDER 32 /* the longest n-gram the graphone decoder takes */

/* The graphone n-gram model as stages/g2p.py G2PModel holds it: records of the arcs, sorted by
   state and then graphone, and of the states, the arcs of state s running from states[s].first to
   states[s + 1].first (a last record closes the last state's arcs). The layouts match the numpy
   record types _ARC and _STATE there. */
typedef struct {
    int32_t token, next;
    double logp;
} Arc;

typedef struct {
    int32_t first, parent;
    double backoff;
} State;

typedef struct {
    const Arc *arcs;
    const State *states;
    Py_ssize_t arc_count, state_count, vocab, order;
} Graphones;

static int broken_model(void) {
    PyErr_SetString(PyExc_ValueError, "g2p_decode: the model arrays do not fit together");
    return -1;
}

/* The graphones one letter may take, with what the search needs of them: slot[token] is the
   token's place among them or -1 (a table over the whole vocabulary), root[j] the root state's arc
   for tokens[j] or -1. The rest is scratch for up to `beam` hypotheses: found and level (count
   elements per hypothesis), the state each walk has reached, its summed backoff weights so far,
   how many choices still lack an arc, and sums (MAX_ORDER + 2 per hypothesis). */
typedef struct {
    const int64_t *tokens;
    Py_ssize_t count;
    int32_t lowest, highest;
    int32_t *slot, *root, *found, *level;
    int64_t *reached;
    double *total, *sums;
    Py_ssize_t *waiting;
} Choices;

/* The first of arcs[start, end) (sorted by token) whose token is not below token; end if none.
   Without branches on the comparisons, which a search of a few hundred arcs mispredicts. */
static inline int32_t lower_bound(const Arc *arcs, int32_t start, int32_t end, int32_t token) {
    if (start >= end)
        return end;
    const Arc *at = arcs + start;
    int32_t n = end - start;
    while (n > 1) { /* the bound lies in [at, at + n] */
        int32_t half = n / 2;
        at = at[half].token < token ? at + half : at;
        n -= half;
    }
    return (int32_t)(at - arcs) + (at->token < token);
}

/* Index of the arc for token among arcs[start, end), or -1. */
static inline int32_t find_arc(const Arc *arcs, int32_t start, int32_t end, int32_t token) {
    int32_t at = lower_bound(arcs, start, end, token);
    return at < end && arcs[at].token == token ? at : -1;
}

/* Sets up the choices of tokens[0, count): checks them, marks them in slot and finds their root arcs;
   on an error slot is left marked. */
static int open_choices(const Graphones *m, Choices *c, const int64_t *tokens, Py_ssize_t count) {
    c->tokens = tokens;
    c->count = count;
    c->lowest = INT32_MAX;
    c->highest = -1;
    const int32_t start = m->states[0].first, end = m->states[1].first;
    if (start < 0 || start > end || end > m->arc_count)
        return broken_model();
    for (Py_ssize_t j = 0; j < count; j++) {
        if (tokens[j] < 0 || tokens[j] >= m->vocab || c->slot[tokens[j]] != -1) {
            PyErr_SetString(PyExc_ValueError, "g2p_decode: a letter's graphones are out of range or repeated");
            return -1;
        }
        c->slot[tokens[j]] = (int32_t)j;
        if (tokens[j] < c->lowest)
            c->lowest = (int32_t)tokens[j];
        if (tokens[j] > c->highest)
            c->highest = (int32_t)tokens[j];
        c->root[j] = find_arc(m->arcs, start, end, (int32_t)tokens[j]);
    }
    return 0;
}

/* Clears the choices' marks from slot for the next letter (the table is the call's own). */
static void close_choices(Choices *c) {
    for (Py_ssize_t j = 0; j < c->count; j++)
        c->slot[c->tokens[j]] = -1;
}

/* ln p(token | state) and the state after it for each of the choices from each of the hypotheses'
   states, backing off to the parent state where no arc exists; written to logp and nxt at
   h * count + j. The sums are made in the order of G2PModel._score: the backoff weights from the
   state down, then the arc's ln p. The choices share each walk down the states: at each state one
   search finds the arcs whose tokens lie between the lowest and highest choice, and those are
   matched against the choices (the root's arcs are known in advance). The walks go down
   together, a state of each at a time, so that the memory reads of different hypotheses overlap. */
static int score_choices(const Graphones *m, const Choices *c, const int64_t *states, Py_ssize_t alive,
                         double *logp, int64_t *nxt) {
    const Py_ssize_t count = c->count;
    for (Py_ssize_t h = 0; h < alive; h++) {
        c->reached[h] = states[h];
        c->total[h] = 0.0;
        c->waiting[h] = count;
        for (Py_ssize_t j = 0; j < count; j++)
            c->found[h * count + j] = -1;
    }
    for (Py_ssize_t step = 0; step <= m->order; step++) {
        int busy = 0;
        for (Py_ssize_t h = 0; h < alive; h++) {
            if (c->waiting[h] == 0)
                continue;
            if (c->reached[h] < 0 || c->reached[h] >= m->state_count)
                return broken_model();
            __builtin_prefetch(&m->states[c->reached[h]]);
            busy = 1;
        }
        if (!busy)
            break;
        for (Py_ssize_t h = 0; h < alive; h++) {
            if (c->waiting[h] > 0 && c->reached[h] != 0)
                __builtin_prefetch(&m->arcs[m->states[c->reached[h]].first]);
        }
        for (Py_ssize_t h = 0; h < alive; h++) {
            if (c->waiting[h] == 0)
                continue;
            const int64_t state = c->reached[h];
            const State *here = &m->states[state];
            const int32_t start = here->first, end = here[1].first;
            if (start < 0 || start > end || end > m->arc_count)
                return broken_model();
            int32_t *found = c->found + h * count, *level = c->level + h * count;
            Py_ssize_t waiting = c->waiting[h];
            c->sums[h * (MAX_ORDER + 2) + step] = c->total[h];
            if (state == 0) {
                for (Py_ssize_t j = 0; j < count; j++) {
                    if (found[j] < 0 && c->root[j] >= 0) {
                        found[j] = c->root[j];
                        level[j] = (int32_t)step;
                        waiting--;
                    }
                }
            } else {
                /* the arcs with tokens from the lowest choice to the highest: a letter's graphones
                   are neighbours in the sorted vocabulary, so these are few */
                for (int32_t a = lower_bound(m->arcs, start, end, c->lowest); a < end; a++) {
                    int32_t token = m->arcs[a].token;
                    if (token > c->highest)
                        break;
                    int32_t j = token >= 0 ? c->slot[token] : -1;
                    if (j >= 0 && found[j] < 0) {
                        found[j] = a;
                        level[j] = (int32_t)step;
                        waiting--;
                    }
                }
            }
            c->waiting[h] = waiting;
            c->total[h] += here->backoff;
            c->reached[h] = here->parent;
        }
    }
    for (Py_ssize_t h = 0; h < alive; h++) {
        const double *sums = c->sums + h * (MAX_ORDER + 2);
        for (Py_ssize_t j = 0; j < count; j++) {
            const int32_t a = c->found[h * count + j];
            if (a >= 0) {
                logp[h * count + j] = sums[c->level[h * count + j]] + m->arcs[a].logp;
                nxt[h * count + j] = m->arcs[a].next;
            } else { /* no arc even at the root: as the numpy path leaves it */
                logp[h * count + j] = c->total[h];
                nxt[h * count + j] = 0;
            }
        }
    }
    return 0;
}

/* Whether leader a ranks before leader b in the beam: higher score, then lower state. */
static inline int keeps_before(double a_score, int64_t a_state, double b_score, int64_t b_state) {
    return a_score > b_score || (a_score == b_score && a_state < b_state);
}

PyDoc_STRVAR(g2p_doc,
"g2p_decode(letters, arcs, states, ids, at, vocab, start, eos, order, beam) -> tuple[int, ...]\n\n"
"The best graphone per letter of letters (a str of a-z), by the beam search of G2PModel.segment.\n"
"arcs and states are the model's record arrays; ids (int64) lists each letter's graphones, those\n"
"of letter c from at[c] to at[c + 1] (at: 27 int64).");

static PyObject *g2p_decode(PyObject *self, PyObject *args) {
    PyObject *letters;
    Py_buffer arcs_b, states_b, ids_b, at_b;
    Py_ssize_t vocab, start, eos, order, beam;
    if (!PyArg_ParseTuple(args, "Uy*y*y*y*nnnnn", &letters, &arcs_b, &states_b, &ids_b, &at_b, &vocab, &start,
                          &eos, &order, &beam))
        return NULL;
    PyObject *result = NULL;
    int64_t *hyp_state = NULL, *cand_next = NULL, *from = NULL, *chosen_token = NULL;
    double *hyp_score = NULL, *cand_total = NULL;
    int32_t *by_state = NULL, *leaders = NULL, *kept = NULL;
    int32_t *slot = NULL, *root = NULL, *found = NULL, *level = NULL;
    int64_t *reached = NULL;
    double *walked = NULL, *sums = NULL;
    Py_ssize_t *waiting = NULL;
    Graphones m = {arcs_b.buf, states_b.buf, arcs_b.len / (Py_ssize_t)sizeof(Arc),
                   states_b.len / (Py_ssize_t)sizeof(State) - 1, vocab, order};
    const int64_t *ids = ids_b.buf, *at = at_b.buf;
    Py_ssize_t id_count = ids_b.len / 8;
    if (check_size(&at_b, 27, 8, "at") < 0)
        goto done;
    if (arcs_b.len % (Py_ssize_t)sizeof(Arc) != 0 || states_b.len % (Py_ssize_t)sizeof(State) != 0 ||
        m.state_count < 1 || m.arc_count >= INT32_MAX) {
        PyErr_SetString(PyExc_ValueError, "g2p_decode: arcs or states are not whole records");
        goto done;
    }
    if (beam < 1 || order < 0 || order > MAX_ORDER || vocab < 1 || vocab >= INT32_MAX || start < 0 ||
        start >= m.state_count || eos < 0 || eos >= vocab) {
        PyErr_SetString(PyExc_ValueError, "g2p_decode: beam, order, vocab, start or eos out of range");
        goto done;
    }
    Py_ssize_t length = PyUnicode_GET_LENGTH(letters), widest = 1;
    int kind = PyUnicode_KIND(letters);
    const void *text = PyUnicode_DATA(letters);
    for (Py_ssize_t i = 0; i < length; i++) {
        Py_UCS4 c = PyUnicode_READ(kind, text, i);
        if (c < 'a' || c > 'z' || at[c - 'a'] < 0 || at[c - 'a'] >= at[c - 'a' + 1] || at[c - 'a' + 1] > id_count) {
            PyErr_Format(PyExc_ValueError, "g2p_decode: letter %zd is not one the model spells", i);
            goto done;
        }
        if (at[c - 'a' + 1] - at[c - 'a'] > widest)
            widest = (Py_ssize_t)(at[c - 'a' + 1] - at[c - 'a']);
    }
    Py_ssize_t most = beam * widest, mask = 16 - 1;
    while (mask + 1 < 2 * most)
        mask = 2 * mask + 1; /* at most a half-full table */
    hyp_state = malloc(sizeof(int64_t) * (size_t)beam);
    hyp_score = malloc(sizeof(double) * (size_t)beam);
    kept = malloc(sizeof(int32_t) * (size_t)beam);
    cand_next = malloc(sizeof(int64_t) * (size_t)most);
    cand_total = malloc(sizeof(double) * (size_t)most);
    leaders = malloc(sizeof(int32_t) * (size_t)most);
    by_state = malloc(sizeof(int32_t) * (size_t)(mask + 1));
    slot = malloc(sizeof(int32_t) * (size_t)vocab);
    root = malloc(sizeof(int32_t) * (size_t)widest);
    found = malloc(sizeof(int32_t) * (size_t)most);
    level = malloc(sizeof(int32_t) * (size_t)most);
    reached = malloc(sizeof(int64_t) * (size_t)beam);
    walked = malloc(sizeof(double) * (size_t)beam);
    sums = malloc(sizeof(double) * (size_t)(beam * (MAX_ORDER + 2)));
    waiting = malloc(sizeof(Py_ssize_t) * (size_t)beam);
    from = malloc(sizeof(int64_t) * (size_t)(length * beam + 1));
    chosen_token = malloc(sizeof(int64_t) * (size_t)(length * beam + 1));
    if (!hyp_state || !hyp_score || !kept || !cand_next || !cand_total || !leaders || !by_state || !slot ||
        !root || !found || !level || !reached || !walked || !sums || !waiting || !from || !chosen_token) {
        PyErr_NoMemory();
        goto done;
    }
    for (Py_ssize_t t = 0; t < vocab; t++)
        slot[t] = -1;
    Choices choices_of = {.slot = slot, .root = root, .found = found, .level = level, .reached = reached,
                          .total = walked, .sums = sums, .waiting = waiting};
    Py_ssize_t alive = 1;
    hyp_state[0] = start;
    hyp_score[0] = 0.0;
    for (Py_ssize_t l = 0; l < length; l++) {
        const Py_UCS4 c = PyUnicode_READ(kind, text, l) - 'a';
        const int64_t *choices = ids + at[c];
        const Py_ssize_t width = (Py_ssize_t)(at[c + 1] - at[c]);
        Py_ssize_t count = alive * width, distinct = 0;
        if (open_choices(&m, &choices_of, choices, width) < 0)
            goto done;
        if (score_choices(&m, &choices_of, hyp_state, alive, cand_total, cand_next) < 0)
            goto done;
        close_choices(&choices_of);
        memset(by_state, 0xff, sizeof(int32_t) * (size_t)(mask + 1)); /* every entry -1: empty */
        for (Py_ssize_t i = 0; i < count; i++) {
            cand_total[i] = hyp_score[i / width] + cand_total[i]; /* the hypothesis' score plus ln p */
            /* the best hypothesis per next state (the rest can never overtake it); on a tie the
               first, as the numpy path's stable sort leaves it */
            Py_ssize_t probe = first_slot((uint64_t)cand_next[i], mask);
            while (by_state[probe] != -1 && cand_next[by_state[probe]] != cand_next[i])
                probe = (probe + 1) & mask;
            if (by_state[probe] == -1) {
                by_state[probe] = (int32_t)i;
                leaders[distinct++] = (int32_t)probe;
            } else if (cand_total[i] > cand_total[by_state[probe]]) {
                by_state[probe] = (int32_t)i;
            }
        }
        /* the beam: the leaders by score, ties by next state, kept in rank order by insertion */
        Py_ssize_t held = 0;
        for (Py_ssize_t d = 0; d < distinct; d++) {
            int32_t i = by_state[leaders[d]];
            double score = cand_total[i];
            int64_t state = cand_next[i];
            Py_ssize_t place = held;
            if (held == beam) {
                if (!keeps_before(score, state, cand_total[kept[beam - 1]], cand_next[kept[beam - 1]]))
                    continue;
                place = beam - 1;
            } else {
                held++;
            }
            while (place > 0 && keeps_before(score, state, cand_total[kept[place - 1]], cand_next[kept[place - 1]])) {
                kept[place] = kept[place - 1];
                place--;
            }
            kept[place] = i;
        }
        for (Py_ssize_t k = 0; k < held; k++) {
            int32_t i = kept[k];
            hyp_state[k] = cand_next[i];
            hyp_score[k] = cand_total[i];
            from[l * beam + k] = i / width;
            chosen_token[l * beam + k] = choices[i % width];
        }
        alive = held;
    }
    Py_ssize_t best = 0;
    double best_score = 0.0;
    const int64_t end_token = eos;
    if (open_choices(&m, &choices_of, &end_token, 1) < 0)
        goto done;
    if (score_choices(&m, &choices_of, hyp_state, alive, cand_total, cand_next) < 0)
        goto done;
    for (Py_ssize_t h = 0; h < alive; h++) {
        double score = hyp_score[h] + cand_total[h]; /* the hypothesis' score plus ln p(</s>) */
        if (h == 0 || score > best_score) { /* the first of equal scores, as numpy's argmax */
            best = h;
            best_score = score;
        }
    }
    result = PyTuple_New(length);
    if (result == NULL)
        goto done;
    for (Py_ssize_t l = length - 1; l >= 0; l--) {
        PyObject *token = PyLong_FromLongLong(chosen_token[l * beam + best]);
        if (token == NULL) {
            Py_CLEAR(result);
            goto done;
        }
        PyTuple_SET_ITEM(result, l, token);
        best = (Py_ssize_t)from[l * beam + best];
    }
done:
    free(hyp_state);
    free(hyp_score);
    free(kept);
    free(cand_next);
    free(cand_total);
    free(leaders);
    free(by_state);
    free(slot);
    free(root);
    free(found);
    free(level);
    free(reached);
    free(walked);
    free(sums);
    free(waiting);
    free(from);
    free(chosen_token);
    PyBuffer_Release(&arcs_b);
    PyBuffer_Release(&states_b);
    PyBuffer_Release(&ids_b);
    PyBuffer_Release(&at_b);
    return result;
}

PyDoc_STRVAR(spans_doc,
"word_spans(token_lists, sound_lists, longest) -> (words, phones, texts, occurrences)\n\n"
"Every run of 1..longest words of every hypothesis, each distinct run once, in order of first\n"
"occurrence: its words (a tuple), its phones (the words' phone strings run together), its text\n"
"(the words joined by spaces) and its occurrences [(hypothesis, start, end), ...]. The same as\n"
"stages/lexicon_match.py _word_spans_python.");

/* The item of list `items` at the index the dict value `number` holds (borrowed). */
static PyObject *column_item(PyObject *items, PyObject *number) {
    Py_ssize_t at = PyLong_AsSsize_t(number);
    if (at == -1 && PyErr_Occurred())
        return NULL;
    return PyList_GET_ITEM(items, at);
}

static PyObject *word_spans(PyObject *self, PyObject *args) {
    PyObject *token_lists, *sound_lists;
    Py_ssize_t longest;
    if (!PyArg_ParseTuple(args, "OOn", &token_lists, &sound_lists, &longest))
        return NULL;
    if (longest < 1) {
        PyErr_SetString(PyExc_ValueError, "longest must be at least 1");
        return NULL;
    }
    PyObject *hyps, *all_sounds;
    if (fast_sequences(token_lists, sound_lists, "token_lists must be a sequence", "sound_lists must be a sequence",
                       &hyps, &all_sounds) < 0)
        return NULL;
    PyObject *index = PyDict_New(), *words = PyList_New(0), *phones = PyList_New(0), *texts = PyList_New(0);
    PyObject *occurrences = PyList_New(0), *space = PyUnicode_FromString(" "), *nothing = PyUnicode_FromString("");
    PyObject *result = NULL, *tokens = NULL, *sounds = NULL, *key = NULL, *occurrence = NULL;
    if (!index || !words || !phones || !texts || !occurrences || !space || !nothing)
        goto done;
    if (PySequence_Fast_GET_SIZE(hyps) != PySequence_Fast_GET_SIZE(all_sounds)) {
        PyErr_SetString(PyExc_ValueError, "token_lists and sound_lists differ in length");
        goto done;
    }
    for (Py_ssize_t number = 0; number < PySequence_Fast_GET_SIZE(hyps); number++) {
        tokens = PySequence_Fast(PySequence_Fast_GET_ITEM(hyps, number), "each token list must be a sequence");
        if (tokens == NULL)
            goto done;
        sounds = PySequence_Fast(PySequence_Fast_GET_ITEM(all_sounds, number), "each sound list must be a sequence");
        if (sounds == NULL)
            goto done;
        Py_ssize_t count = PySequence_Fast_GET_SIZE(tokens);
        if (PySequence_Fast_GET_SIZE(sounds) != count) {
            PyErr_SetString(PyExc_ValueError, "a token list and its sound list differ in length");
            goto done;
        }
        for (Py_ssize_t i = 0; i < count; i++) {
            if (!PyUnicode_Check(PySequence_Fast_GET_ITEM(tokens, i)) ||
                !PyUnicode_Check(PySequence_Fast_GET_ITEM(sounds, i))) {
                PyErr_SetString(PyExc_TypeError, "tokens and sounds must be str");
                goto done;
            }
        }
        for (Py_ssize_t start = 0; start < count; start++) {
            Py_ssize_t stop = count < start + longest ? count : start + longest;
            for (Py_ssize_t end = start + 1; end <= stop; end++) {
                key = PyTuple_New(end - start);
                if (key == NULL)
                    goto done;
                for (Py_ssize_t i = start; i < end; i++) {
                    PyObject *token = PySequence_Fast_GET_ITEM(tokens, i);
                    Py_INCREF(token);
                    PyTuple_SET_ITEM(key, i - start, token);
                }
                occurrence = Py_BuildValue("(nnn)", number, start, end);
                if (occurrence == NULL)
                    goto done;
                PyObject *found = PyDict_GetItemWithError(index, key);  /* borrowed */
                if (found != NULL) {
                    PyObject *held = column_item(occurrences, found);
                    if (held == NULL || PyList_Append(held, occurrence) < 0)
                        goto done;
                } else {
                    if (PyErr_Occurred())
                        goto done;
                    PyObject *at = PyLong_FromSsize_t(PyList_GET_SIZE(words));
                    if (at == NULL)
                        goto done;
                    int failed = PyDict_SetItem(index, key, at);
                    Py_DECREF(at);
                    if (failed < 0 || PyList_Append(words, key) < 0)
                        goto done;
                    PyObject *run = PySequence_GetSlice(sounds, start, end);
                    PyObject *joined = run ? PyUnicode_Join(nothing, run) : NULL;
                    Py_XDECREF(run);
                    failed = joined == NULL || PyList_Append(phones, joined) < 0;
                    Py_XDECREF(joined);
                    if (failed)
                        goto done;
                    joined = PyUnicode_Join(space, key);
                    failed = joined == NULL || PyList_Append(texts, joined) < 0;
                    Py_XDECREF(joined);
                    if (failed)
                        goto done;
                    PyObject *held = PyList_New(1);
                    if (held == NULL)
                        goto done;
                    Py_INCREF(occurrence);
                    PyList_SET_ITEM(held, 0, occurrence);
                    failed = PyList_Append(occurrences, held) < 0;
                    Py_DECREF(held);
                    if (failed)
                        goto done;
                }
                Py_CLEAR(occurrence);
                Py_CLEAR(key);
            }
        }
        Py_CLEAR(tokens);
        Py_CLEAR(sounds);
    }
    result = PyTuple_Pack(4, words, phones, texts, occurrences);
done:
    Py_XDECREF(occurrence);
    Py_XDECREF(key);
    Py_XDECREF(tokens);
    Py_XDECREF(sounds);
    Py_XDECREF(index);
    Py_XDECREF(words);
    Py_XDECREF(phones);
    Py_XDECREF(texts);
    Py_XDECREF(occurrences);
    Py_XDECREF(space);
    Py_XDECREF(nothing);
    Py_DECREF(hyps);
    Py_DECREF(all_sounds);
    return result;
}

/* ---- pair scoring: the screen, the phone alignment, spelling and key terms of span/form pairs ---- */

/* Code points of a str into out (its length); with skip_spaces, U+0020 is left out. */
static Py_ssize_t read_points(PyObject *text, int32_t *out, int skip_spaces) {
    int kind = PyUnicode_KIND(text);
    const void *data = PyUnicode_DATA(text);
    Py_ssize_t length = PyUnicode_GET_LENGTH(text), made = 0;
    for (Py_ssize_t i = 0; i < length; i++) {
        Py_UCS4 point = PyUnicode_READ(kind, data, i);
        if (skip_spaces && point == ' ')
            continue;
        out[made++] = (int32_t)point;
    }
    return made;
}

/* Unit-cost edit distance (Levenshtein), one row of work space of m + 1. */
static Py_ssize_t edit_distance(const int32_t *a, Py_ssize_t n, const int32_t *b, Py_ssize_t m, Py_ssize_t *row) {
    for (Py_ssize_t j = 0; j <= m; j++)
        row[j] = j;
    for (Py_ssize_t i = 1; i <= n; i++) {
        Py_ssize_t diagonal = row[0];
        row[0] = i;
        for (Py_ssize_t j = 1; j <= m; j++) {
            Py_ssize_t above = row[j];
            Py_ssize_t best = diagonal + (a[i - 1] != b[j - 1]);
            if (above + 1 < best)
                best = above + 1;
            if (row[j - 1] + 1 < best)
                best = row[j - 1] + 1;
            row[j] = best;
            diagonal = above;
        }
    }
    return row[m];
}

/* Longest common subsequence, one row of work space of m + 1. */
static Py_ssize_t common_subsequence(const int32_t *a, Py_ssize_t n, const int32_t *b, Py_ssize_t m, Py_ssize_t *row) {
    for (Py_ssize_t j = 0; j <= m; j++)
        row[j] = 0;
    for (Py_ssize_t i = 1; i <= n; i++) {
        Py_ssize_t diagonal = 0;
        for (Py_ssize_t j = 1; j <= m; j++) {
            Py_ssize_t above = row[j];
            if (a[i - 1] == b[j - 1])
                row[j] = diagonal + 1;
            else if (row[j - 1] > above)
                row[j] = row[j - 1];
            diagonal = above;
        }
    }
    return row[m];
}

/* Bit masks of where each character stands in a string of at most 64 (Hyyrö's bit-parallel
   algorithms), in a small open-addressing table: any code point, one probe for most. */
typedef struct {
    int32_t key[128];
    uint64_t mask[128];
} Positions;

static inline Py_ssize_t positions_slot(const Positions *t, int32_t c) {
    Py_ssize_t at = (Py_ssize_t)(((uint32_t)c * 2654435761u) >> 25);
    while (t->key[at] != -1 && t->key[at] != c)
        at = (at + 1) & 127;
    return at;
}

static void positions_of(Positions *t, const int32_t *a, Py_ssize_t n) {
    memset(t->key, 0xff, sizeof t->key);
    for (Py_ssize_t i = 0; i < n; i++) {
        Py_ssize_t at = positions_slot(t, a[i]);
        if (t->key[at] == -1) {
            t->key[at] = a[i];
            t->mask[at] = 0;
        }
        t->mask[at] |= 1ull << i;
    }
}

static inline uint64_t positions_get(const Positions *t, int32_t c) {
    Py_ssize_t at = positions_slot(t, c);
    return t->key[at] == -1 ? 0 : t->mask[at];
}

/* Edit distance, a no longer than 64: Hyyrö's bit-vector form of Myers' algorithm. */
static Py_ssize_t edit_distance_bits(const int32_t *a, Py_ssize_t n, const int32_t *b, Py_ssize_t m) {
    Positions t;
    positions_of(&t, a, n);
    uint64_t vp = n == 64 ? ~0ull : (1ull << n) - 1, vn = 0, last = 1ull << (n - 1);
    Py_ssize_t distance = n;
    for (Py_ssize_t j = 0; j < m; j++) {
        uint64_t x = positions_get(&t, b[j]) | vn;
        uint64_t d0 = (((x & vp) + vp) ^ vp) | x;
        uint64_t hn = vp & d0, hp = vn | ~(vp | d0);
        if (hp & last)
            distance++;
        else if (hn & last)
            distance--;
        x = (hp << 1) | 1;
        vn = x & d0;
        vp = (hn << 1) | ~(x | d0);
    }
    return distance;
}

/* Longest common subsequence, a no longer than 64: the bit-parallel form (Hyyrö 2004). */
static Py_ssize_t common_subsequence_bits(const int32_t *a, Py_ssize_t n, const int32_t *b, Py_ssize_t m) {
    Positions t;
    positions_of(&t, a, n);
    uint64_t s = ~0ull;
    for (Py_ssize_t j = 0; j < m; j++) {
        uint64_t u = s & positions_get(&t, b[j]);
        s = (s + u) | (s - u);
    }
    uint64_t used = n == 64 ? ~0ull : (1ull << n) - 1;
    return (Py_ssize_t)__builtin_popcountll(~s & used);
}

/* rapidfuzz's Levenshtein.normalized_similarity: 1 - distance / longer length (1 for two empties). */
static double edit_similarity(const int32_t *a, Py_ssize_t n, const int32_t *b, Py_ssize_t m, Py_ssize_t *row) {
    Py_ssize_t maximum = n > m ? n : m, edits;
    if (n == 0 || m == 0)
        edits = maximum;
    else if (n <= 64)
        edits = edit_distance_bits(a, n, b, m);
    else if (m <= 64)
        edits = edit_distance_bits(b, m, a, n);
    else
        edits = edit_distance(a, n, b, m, row);
    double distance = maximum ? (double)edits / (double)maximum : 0.0;
    return 1.0 - distance;
}

/* rapidfuzz's fuzz.ratio: 100 (1 - Indel distance / summed lengths), Indel distance = sum - 2 LCS. */
static double indel_ratio(const int32_t *a, Py_ssize_t n, const int32_t *b, Py_ssize_t m, Py_ssize_t *row) {
    Py_ssize_t maximum = n + m, common;
    if (n == 0 || m == 0)
        common = 0;
    else if (n <= 64)
        common = common_subsequence_bits(a, n, b, m);
    else if (m <= 64)
        common = common_subsequence_bits(b, m, a, n);
    else
        common = common_subsequence(a, n, b, m, row);
    double distance = maximum ? (double)(maximum - 2 * common) / (double)maximum : 0.0;
    return (1.0 - distance) * 100.0;
}

static PyObject *attr_phones, *attr_text, *attr_keys; /* interned names of the Form fields read */

/* A str attribute of a form (new reference), checked. */
static PyObject *form_str(PyObject *forms, Py_ssize_t at, PyObject *name) {
    if (at < 0 || at >= PyList_GET_SIZE(forms)) {
        PyErr_SetString(PyExc_IndexError, "pair scoring: form number outside the lexicon");
        return NULL;
    }
    PyObject *value = PyObject_GetAttr(PyList_GET_ITEM(forms, at), name);
    if (value != NULL && !PyUnicode_Check(value)) {
        PyErr_SetString(PyExc_TypeError, "pair scoring: a form's phones and text must be str");
        Py_CLEAR(value);
    }
    return value;
}

typedef struct {
    int32_t *a, *b;
    Py_ssize_t *row;
    float *cum, *frow, *fnext;
    Py_ssize_t size;
} Work;

static int work_fit(Work *w, Py_ssize_t length) {
    if (length < w->size)
        return 0;
    Py_ssize_t size = 2 * length + 16;
    int32_t *a = realloc(w->a, sizeof(int32_t) * (size_t)size);
    if (a) w->a = a;
    int32_t *b = realloc(w->b, sizeof(int32_t) * (size_t)size);
    if (b) w->b = b;
    Py_ssize_t *row = realloc(w->row, sizeof(Py_ssize_t) * (size_t)size);
    if (row) w->row = row;
    float *cum = realloc(w->cum, sizeof(float) * (size_t)size);
    if (cum) w->cum = cum;
    float *frow = realloc(w->frow, sizeof(float) * (size_t)size);
    if (frow) w->frow = frow;
    float *fnext = realloc(w->fnext, sizeof(float) * (size_t)size);
    if (fnext) w->fnext = fnext;
    if (!a || !b || !row || !cum || !frow || !fnext) {
        PyErr_NoMemory();
        return -1;
    }
    w->size = size;
    return 0;
}

static void work_free(Work *w) {
    free(w->a);
    free(w->b);
    free(w->row);
    free(w->cum);
    free(w->frow);
    free(w->fnext);
}

PyDoc_STRVAR(screen_doc,
"pair_screen(span_phones, forms, queries, items, screen, substitution, insertion, deletion, stride,\n"
"            char_base, phone_weight, spelling_weight, key_weight, min_phone, floor,\n"
"            out_query, out_item, out_score) -> int\n\n"
"The pairs (queries[i], items[i]) of span and form (forms[items[i]].phones) that pass the unit-cost\n"
"screen (similarity >= screen), whose aligned phone similarity reaches min_phone and whose\n"
"phone term phone_weight x similarity could still reach floor; writes them, in order, with that\n"
"term (float64) into the out buffers and returns how many. The same floats as score_spans.");

static PyObject *pair_screen(PyObject *self, PyObject *args) {
    PyObject *span_phones, *forms;
    Py_buffer q_b, i_b, sub_b, ins_b, del_b, oq_b, oi_b, os_b;
    double screen, phone_weight, spelling_weight, key_weight, min_phone, floor;
    int stride, char_base;
    if (!PyArg_ParseTuple(args, "O!O!y*y*dy*y*y*iidddddw*w*w*", &PyList_Type, &span_phones, &PyList_Type, &forms,
                          &q_b, &i_b, &screen, &sub_b, &ins_b, &del_b, &stride, &char_base, &phone_weight,
                          &spelling_weight, &key_weight, &min_phone, &floor, &oq_b, &oi_b, &os_b))
        return NULL;
    PyObject *result = NULL;
    Work w = {0};
    Py_ssize_t count = q_b.len / 4;
    if (check_size(&i_b, count, 4, "items") < 0 || check_size(&oq_b, count, 4, "out_query") < 0 ||
        check_size(&oi_b, count, 4, "out_item") < 0 || check_size(&os_b, count, 8, "out_score") < 0 ||
        check_size(&sub_b, (Py_ssize_t)stride * stride, 4, "substitution") < 0 ||
        check_size(&ins_b, stride, 4, "insertion") < 0 || check_size(&del_b, stride, 4, "deletion") < 0)
        goto done;
    const int32_t *queries = q_b.buf, *items = i_b.buf;
    int32_t *out_query = oq_b.buf, *out_item = oi_b.buf;
    double *out_score = os_b.buf;
    const float *sub = sub_b.buf, *inserted = ins_b.buf, *deleted = del_b.buf;
    Py_ssize_t written = 0, spans = PyList_GET_SIZE(span_phones);
    for (Py_ssize_t p = 0; p < count; p++) {
        if (queries[p] < 0 || queries[p] >= spans) {
            PyErr_SetString(PyExc_IndexError, "pair_screen: span number outside the spans");
            goto done;
        }
        PyObject *heard = PyList_GET_ITEM(span_phones, queries[p]);
        PyObject *said = form_str(forms, items[p], attr_phones);
        if (said == NULL)
            goto done;
        if (!PyUnicode_Check(heard)) {
            Py_DECREF(said);
            PyErr_SetString(PyExc_TypeError, "pair_screen: span phones must be str");
            goto done;
        }
        Py_ssize_t longer = PyUnicode_GET_LENGTH(heard) > PyUnicode_GET_LENGTH(said) ? PyUnicode_GET_LENGTH(heard)
                                                                                     : PyUnicode_GET_LENGTH(said);
        if (work_fit(&w, longer + 1) < 0) {
            Py_DECREF(said);
            goto done;
        }
        Py_ssize_t n = read_points(heard, w.a, 0), m = read_points(said, w.b, 0);
        Py_DECREF(said);
        if (!(edit_similarity(w.a, n, w.b, m, w.row) >= screen))
            continue;
        for (Py_ssize_t i = 0; i < n; i++) {
            w.a[i] -= char_base;
            if (w.a[i] < 0 || w.a[i] >= stride)
                goto not_phones;
        }
        for (Py_ssize_t j = 0; j < m; j++) {
            w.b[j] -= char_base;
            if (w.b[j] < 0 || w.b[j] >= stride)
                goto not_phones;
        }
        /* batch_similarity in float32: clip(1 - cost / max(longer length, 1), 0, 1) */
        float cost = align_codes(w.a, n, w.b, m, sub, inserted, deleted, stride, w.cum, w.frow, w.fnext);
        float longest = (float)(n > m ? n : m);
        float similarity = 1.0f - cost / (longest > 1.0f ? longest : 1.0f);
        similarity = similarity < 0.0f ? 0.0f : (similarity > 1.0f ? 1.0f : similarity);
        double phone = (double)similarity, score = phone_weight * phone;
        if (phone < min_phone || score + spelling_weight + key_weight < floor)
            continue;
        out_query[written] = queries[p];
        out_item[written] = items[p];
        out_score[written] = score;
        written++;
    }
    result = PyLong_FromSsize_t(written);
    goto done;
not_phones:
    PyErr_SetString(PyExc_ValueError, "pair_screen: a phone string holds a character that is not an encoded phone");
done:
    work_free(&w);
    PyBuffer_Release(&q_b);
    PyBuffer_Release(&i_b);
    PyBuffer_Release(&sub_b);
    PyBuffer_Release(&ins_b);
    PyBuffer_Release(&del_b);
    PyBuffer_Release(&oq_b);
    PyBuffer_Release(&oi_b);
    PyBuffer_Release(&os_b);
    return result;
}

/* The first or last key (new reference) of a keys tuple. */
static PyObject *key_of(PyObject *keys, int last) {
    if (!PyTuple_Check(keys) || PyTuple_GET_SIZE(keys) == 0) {
        PyErr_SetString(PyExc_TypeError, "pair_finish: keys must be non-empty tuples of str");
        return NULL;
    }
    PyObject *key = PyTuple_GET_ITEM(keys, last ? PyTuple_GET_SIZE(keys) - 1 : 0);
    if (!PyUnicode_Check(key)) {
        PyErr_SetString(PyExc_TypeError, "pair_finish: keys must be str");
        return NULL;
    }
    Py_INCREF(key);
    return key;
}

PyDoc_STRVAR(finish_doc,
"pair_finish(span_texts, span_keys, forms, queries, items, scores, count, spelling_weight, key_weight,\n"
"            floor, total, pairs) -> None\n\n"
"Adds to the first count phone terms their spelling term (fuzz.ratio of the texts, spaces\n"
"removed) and key term (the best normalised Levenshtein similarity of the first and last\n"
"Double Metaphone keys of each side, span_keys[query] and forms[item].keys), and appends\n"
"(query, item, score / total, False) to the list pairs for each pair reaching floor.");

static PyObject *pair_finish(PyObject *self, PyObject *args) {
    PyObject *span_texts, *span_keys, *forms, *pairs;
    Py_buffer q_b, i_b, s_b;
    Py_ssize_t count;
    double spelling_weight, key_weight, floor, total;
    if (!PyArg_ParseTuple(args, "O!OO!y*y*y*nddddO!", &PyList_Type, &span_texts, &span_keys, &PyList_Type, &forms,
                          &q_b, &i_b, &s_b, &count, &spelling_weight, &key_weight, &floor, &total, &PyList_Type,
                          &pairs))
        return NULL;
    PyObject *result = NULL;
    Work w = {0};
    if (count < 0 || check_size(&q_b, count, 4, "queries") < 0 || check_size(&i_b, count, 4, "items") < 0 ||
        check_size(&s_b, count, 8, "scores") < 0)
        goto done;
    if (key_weight != 0.0 && !PyList_Check(span_keys)) {
        PyErr_SetString(PyExc_TypeError, "pair_finish: span_keys must be a list when key_weight is not 0");
        goto done;
    }
    const int32_t *queries = q_b.buf, *items = i_b.buf;
    const double *scores = s_b.buf;
    Py_ssize_t spans = PyList_GET_SIZE(span_texts);
    for (Py_ssize_t p = 0; p < count; p++) {
        if (queries[p] < 0 || queries[p] >= spans) {
            PyErr_SetString(PyExc_IndexError, "pair_finish: span number outside the spans");
            goto done;
        }
        double score = scores[p];
        if (spelling_weight != 0.0) {
            PyObject *heard = PyList_GET_ITEM(span_texts, queries[p]);
            PyObject *said = form_str(forms, items[p], attr_text);
            if (said == NULL)
                goto done;
            if (!PyUnicode_Check(heard) ||
                work_fit(&w, PyUnicode_GET_LENGTH(heard) + PyUnicode_GET_LENGTH(said) + 1) < 0) {
                Py_DECREF(said);
                if (!PyErr_Occurred())
                    PyErr_SetString(PyExc_TypeError, "pair_finish: span texts must be str");
                goto done;
            }
            Py_ssize_t n = read_points(heard, w.a, 1), m = read_points(said, w.b, 1);
            Py_DECREF(said);
            score = score + spelling_weight * indel_ratio(w.a, n, w.b, m, w.row) / 100.0;
        }
        if (key_weight != 0.0) {
            if (queries[p] >= PyList_GET_SIZE(span_keys)) {
                PyErr_SetString(PyExc_IndexError, "pair_finish: span_keys is shorter than the spans");
                goto done;
            }
            PyObject *form_keys = PyObject_GetAttr(PyList_GET_ITEM(forms, items[p]), attr_keys);
            if (form_keys == NULL)
                goto done;
            PyObject *sides[4] = {key_of(PyList_GET_ITEM(span_keys, queries[p]), 0),
                                  key_of(PyList_GET_ITEM(span_keys, queries[p]), 1), key_of(form_keys, 0),
                                  key_of(form_keys, 1)};
            Py_DECREF(form_keys);
            double best = 0.0;
            int failed = !sides[0] || !sides[1] || !sides[2] || !sides[3];
            /* the four (span key, form key) combinations, as cpdist of first+first+last+last
               against their first+last+first+last, then the maximum */
            for (int c = 0; c < 4 && !failed; c++) {
                PyObject *x = sides[c < 2 ? 0 : 1], *y = sides[2 + (c % 2)];
                if (work_fit(&w, PyUnicode_GET_LENGTH(x) + PyUnicode_GET_LENGTH(y) + 1) < 0) {
                    failed = 1;
                    break;
                }
                Py_ssize_t n = read_points(x, w.a, 0), m = read_points(y, w.b, 0);
                double similar = edit_similarity(w.a, n, w.b, m, w.row);
                if (c == 0 || similar > best)
                    best = similar;
            }
            for (int c = 0; c < 4; c++)
                Py_XDECREF(sides[c]);
            if (failed)
                goto done;
            score = score + key_weight * best;
        }
        if (score >= floor) {
            PyObject *pair = Py_BuildValue("(iidO)", queries[p], items[p], score / total, Py_False);
            if (pair == NULL)
                goto done;
            int failed = PyList_Append(pairs, pair) < 0;
            Py_DECREF(pair);
            if (failed)
                goto done;
        }
    }
    Py_INCREF(Py_None);
    result = Py_None;
done:
    work_free(&w);
    PyBuffer_Release(&q_b);
    PyBuffer_Release(&i_b);
    PyBuffer_Release(&s_b);
    return result;
}

/* ---- pooling: each entry's best sighting per hypothesis and their posterior-weighted sum ---- */

static PyObject *attr_entry; /* interned name of the Form field pooling reads (and attr_phones) */

typedef struct {
    double score;
    Py_ssize_t start, end, form;
    Py_ssize_t phones; /* how many phones the form has */
    int exact;
    /* The objects the Sighting is made of: borrowed from the pairs and occurrences, which the
       caller holds for the whole call (the Python version passes these same objects). */
    PyObject *score_obj, *start_obj, *end_obj, *form_obj, *exact_obj;
} Seen;

/* A Py_ssize_t attribute of forms[at] (the caller checked at), or -1 with an error set. */
/* The number of phones of a form (its encoded phone string's length); -1 with an exception set. */
static Py_ssize_t form_phones(PyObject *form) {
    PyObject *value = PyObject_GetAttr(form, attr_phones);
    if (value == NULL)
        return -1;
    if (!PyUnicode_Check(value)) {
        Py_DECREF(value);
        PyErr_SetString(PyExc_TypeError, "pool_pairs: a form's phones must be a str");
        return -1;
    }
    Py_ssize_t number = PyUnicode_GET_LENGTH(value);
    Py_DECREF(value);
    return number;
}

/* match.py _better: whether a new sighting replaces the held one. */
static int better_seen(const Seen *new, const Seen *held, double strong) {
    Py_ssize_t new_length = new->end - new->start, held_length = held->end - held->start;
    int contains = new->start <= held->start && held->end <= new->end && new_length > held_length &&
                   new->phones > held->phones;
    int inside = held->start <= new->start && new->end <= held->end && held_length > new_length &&
                 held->phones > new->phones;
    if (!new->exact && new->score >= strong && contains)
        return 1;
    if (!held->exact && held->score >= strong && inside)
        return 0;
    return new->score > held->score || (new->score == held->score && new_length > held_length);
}

PyDoc_STRVAR(pool_doc,
"pool_pairs(occurrences, pairs, forms, posteriors, strong, evidence, sighting) -> dict\n\n"
"stages/lexicon/match.py _pool_python: for each entry (forms[f].entry of a pair (q, f, score, exact))\n"
"the best sighting in each hypothesis over the occurrences[q] (hypothesis, start, end) of its\n"
"spans, and pooled, the sum over those hypotheses of posteriors[h] x score as Python's sum adds it.\n"
"Returns {entry: evidence(entry, pooled, {h: sighting(score, start, end, f, exact)})} with\n"
"entries and hypotheses in order of first sighting, as the Python version does.");

static PyObject *pool_pairs(PyObject *self, PyObject *args) {
    PyObject *occurrences, *pair_list, *forms, *posterior_list, *evidence_type, *sighting_type;
    double strong;
    if (!PyArg_ParseTuple(args, "O!OO!OdOO", &PyList_Type, &occurrences, &pair_list, &PyList_Type, &forms,
                          &posterior_list, &strong, &evidence_type, &sighting_type))
        return NULL;
    PyObject *pairs, *posteriors;
    if (fast_sequences(pair_list, posterior_list, "pool_pairs: pairs must be a sequence",
                       "pool_pairs: posteriors must be a sequence", &pairs, &posteriors) < 0)
        return NULL;
    Py_ssize_t count = PySequence_Fast_GET_SIZE(pairs), hypotheses = PySequence_Fast_GET_SIZE(posteriors);
    Py_ssize_t spans = PyList_GET_SIZE(occurrences), form_count = PyList_GET_SIZE(forms);
    Py_ssize_t cells = count * hypotheses, known = 0; /* entries seen so far */
    PyObject *result = NULL, *evidence = NULL, **entries = NULL;
    double *weights = malloc(sizeof(double) * (size_t)(hypotheses + 1));
    Seen *seen = malloc(sizeof(Seen) * (size_t)(cells + 1));
    char *held = calloc((size_t)(cells + 1), 1);
    int32_t *order = malloc(sizeof(int32_t) * (size_t)(cells + 1)); /* per entry: hypotheses in order first seen */
    Py_ssize_t *sighted = calloc((size_t)(count + 1), sizeof(Py_ssize_t)), mask = 16 - 1;
    while (mask + 1 < 2 * count)
        mask = 2 * mask + 1;
    int64_t *slots = malloc(sizeof(int64_t) * (size_t)(mask + 1)); /* entry ids, -1 when empty */
    Py_ssize_t *slot_entry = malloc(sizeof(Py_ssize_t) * (size_t)(mask + 1));
    entries = calloc((size_t)(count + 1), sizeof(PyObject *)); /* owned: each entry's number as given */
    if (!weights || !seen || !held || !order || !sighted || !slots || !slot_entry || !entries) {
        PyErr_NoMemory();
        goto done;
    }
    memset(slots, 0xff, sizeof(int64_t) * (size_t)(mask + 1));
    for (Py_ssize_t h = 0; h < hypotheses; h++) {
        weights[h] = PyFloat_AsDouble(PySequence_Fast_GET_ITEM(posteriors, h));
        if (weights[h] == -1.0 && PyErr_Occurred())
            goto done;
    }
    for (Py_ssize_t p = 0; p < count; p++) {
        PyObject *pair = PySequence_Fast_GET_ITEM(pairs, p);
        if (!PyTuple_Check(pair) || PyTuple_GET_SIZE(pair) != 4) {
            PyErr_SetString(PyExc_TypeError, "pool_pairs: each pair must be a tuple (span, form, score, exact)");
            goto done;
        }
        Seen new;
        new.form_obj = PyTuple_GET_ITEM(pair, 1);
        new.score_obj = PyTuple_GET_ITEM(pair, 2);
        new.exact_obj = PyTuple_GET_ITEM(pair, 3);
        Py_ssize_t q = PyLong_AsSsize_t(PyTuple_GET_ITEM(pair, 0));
        new.form = PyLong_AsSsize_t(new.form_obj);
        new.score = PyFloat_AsDouble(new.score_obj);
        new.exact = PyObject_IsTrue(new.exact_obj);
        if (PyErr_Occurred() || new.exact < 0)
            goto done;
        if (q < 0 || q >= spans || new.form < 0 || new.form >= form_count) {
            PyErr_SetString(PyExc_IndexError, "pool_pairs: span or form number out of range");
            goto done;
        }
        new.phones = form_phones(PyList_GET_ITEM(forms, new.form));
        if (new.phones < 0)
            goto done;
        PyObject *entry = PyObject_GetAttr(PyList_GET_ITEM(forms, new.form), attr_entry);
        if (entry == NULL)
            goto done;
        Py_ssize_t id = PyLong_AsSsize_t(entry);
        if (id < 0) {
            if (!PyErr_Occurred())
                PyErr_SetString(PyExc_ValueError, "pool_pairs: a form's entry must not be negative");
            Py_DECREF(entry);
            goto done;
        }
        Py_ssize_t at = slot_of(slots, mask, (int64_t)id);
        if (slots[at] == -1) {
            slots[at] = (int64_t)id;
            slot_entry[at] = known;
            entries[known++] = entry; /* the reference is kept */
        } else {
            Py_DECREF(entry);
        }
        Py_ssize_t e = slot_entry[at];
        PyObject *places = PyList_GET_ITEM(occurrences, q);
        if (!PyList_Check(places)) {
            PyErr_SetString(PyExc_TypeError, "pool_pairs: each span's occurrences must be a list");
            goto done;
        }
        for (Py_ssize_t o = 0; o < PyList_GET_SIZE(places); o++) {
            PyObject *place = PyList_GET_ITEM(places, o);
            if (!PyTuple_Check(place) || PyTuple_GET_SIZE(place) != 3) {
                PyErr_SetString(PyExc_TypeError, "pool_pairs: an occurrence must be a tuple (hypothesis, start, end)");
                goto done;
            }
            new.start_obj = PyTuple_GET_ITEM(place, 1);
            new.end_obj = PyTuple_GET_ITEM(place, 2);
            Py_ssize_t h = PyLong_AsSsize_t(PyTuple_GET_ITEM(place, 0));
            new.start = PyLong_AsSsize_t(new.start_obj);
            new.end = PyLong_AsSsize_t(new.end_obj);
            if (PyErr_Occurred())
                goto done;
            if (h < 0 || h >= hypotheses) {
                PyErr_SetString(PyExc_IndexError, "pool_pairs: hypothesis number outside the posteriors");
                goto done;
            }
            Py_ssize_t cell = e * hypotheses + h;
            Seen *old = &seen[cell];
            if (!held[cell]) {
                held[cell] = 1;
                order[e * hypotheses + sighted[e]++] = (int32_t)h;
                *old = new;
            } else if (better_seen(&new, old, strong)) {
                *old = new;
            }
        }
    }
    evidence = PyDict_New();
    if (evidence == NULL)
        goto done;
    for (Py_ssize_t e = 0; e < known; e++) {
        PyObject *by_hypothesis = PyDict_New();
        if (by_hypothesis == NULL)
            goto done;
        /* float(sum([...])): the int 0 plus the first product, then the rest as this Python's sum
           adds floats (plain additions before 3.12, Neumaier's compensated sum since). */
        double total = 0.0, compensation = 0.0;
        for (Py_ssize_t k = 0; k < sighted[e]; k++) {
            Py_ssize_t h = order[e * hypotheses + k];
            const Seen *best = &seen[e * hypotheses + h];
            PyObject *fields[5] = {best->score_obj, best->start_obj, best->end_obj, best->form_obj, best->exact_obj};
            PyObject *sighting = PyObject_Vectorcall(sighting_type, fields, 5, NULL);
            PyObject *key = sighting ? PyLong_FromSsize_t(h) : NULL;
            int failed = key == NULL || PyDict_SetItem(by_hypothesis, key, sighting) < 0;
            Py_XDECREF(key);
            Py_XDECREF(sighting);
            if (failed) {
                Py_DECREF(by_hypothesis);
                goto done;
            }
            double x = weights[h] * best->score;
            if (k == 0) {
                total = 0.0 + x;
                continue;
            }
#if PY_VERSION_HEX >= 0x030C0000
            double t = total + x;
            if (fabs(total) >= fabs(x))
                compensation += (total - t) + x;
            else
                compensation += (x - t) + total;
            total = t;
#else
            total += x;
#endif
        }
#if PY_VERSION_HEX >= 0x030C0000
        if (compensation != 0.0 && isfinite(compensation))
            total += compensation;
#else
        (void)compensation;
#endif
        PyObject *pooled = PyFloat_FromDouble(total);
        if (pooled == NULL) {
            Py_DECREF(by_hypothesis);
            goto done;
        }
        PyObject *fields[3] = {entries[e], pooled, by_hypothesis};
        PyObject *found = PyObject_Vectorcall(evidence_type, fields, 3, NULL);
        Py_DECREF(pooled);
        Py_DECREF(by_hypothesis);
        int failed = found == NULL || PyDict_SetItem(evidence, entries[e], found) < 0;
        Py_XDECREF(found);
        if (failed)
            goto done;
    }
    result = evidence;
    evidence = NULL;
done:
    Py_XDECREF(evidence);
    if (entries != NULL)
        for (Py_ssize_t e = 0; e < known; e++)
            Py_DECREF(entries[e]);
    free(entries);
    free(weights);
    free(seen);
    free(held);
    free(order);
    free(sighted);
    free(slots);
    free(slot_entry);
    Py_DECREF(pairs);
    Py_DECREF(posteriors);
    return result;
}

/* ---- the two index searches' hits as one list of pairs ---- */

/* Whether value is in a set made by add_once. */
static inline int holds(const int64_t *slots, Py_ssize_t mask, int64_t value) {
    return slots[slot_of(slots, mask, value)] == value;
}

PyDoc_STRVAR(merge_doc,
"merge_hits(query, item, more_query, more_item, out_query, out_item) -> int\n\n"
"The pairs (query[i], item[i]), then each pair (more_query[j], more_item[j]) that is not among\n"
"those first ones, in order, into the out buffers (int32, room for both); returns how many.\n"
"score_spans's merge of the phone and broad-class hits, as its Python version does it.");

static PyObject *merge_hits(PyObject *self, PyObject *args) {
    Py_buffer q_b, i_b, mq_b, mi_b, oq_b, oi_b;
    if (!PyArg_ParseTuple(args, "y*y*y*y*w*w*", &q_b, &i_b, &mq_b, &mi_b, &oq_b, &oi_b))
        return NULL;
    PyObject *result = NULL;
    int64_t *slots = NULL;
    Py_ssize_t first = q_b.len / 4, more = mq_b.len / 4, mask = 16 - 1;
    if (check_size(&i_b, first, 4, "item") < 0 || check_size(&mi_b, more, 4, "more_item") < 0 ||
        check_size(&oq_b, first + more, 4, "out_query") < 0 || check_size(&oi_b, first + more, 4, "out_item") < 0)
        goto done;
    while (mask + 1 < 2 * first)
        mask = 2 * mask + 1;
    slots = malloc(sizeof(int64_t) * (size_t)(mask + 1));
    if (slots == NULL) {
        PyErr_NoMemory();
        goto done;
    }
    memset(slots, 0xff, sizeof(int64_t) * (size_t)(mask + 1)); /* every slot -1: empty */
    const int32_t *query = q_b.buf, *item = i_b.buf, *more_query = mq_b.buf, *more_item = mi_b.buf;
    int32_t *out_query = oq_b.buf, *out_item = oi_b.buf;
    Py_ssize_t written = 0;
    for (Py_ssize_t i = 0; i < first; i++) {
        if (query[i] < 0 || item[i] < 0) {
            PyErr_SetString(PyExc_ValueError, "merge_hits: negative query or item");
            goto done;
        }
        add_once(slots, mask, ((int64_t)query[i] << 32) | item[i]);
        out_query[written] = query[i];
        out_item[written] = item[i];
        written++;
    }
    for (Py_ssize_t j = 0; j < more; j++) {
        if (more_query[j] < 0 || more_item[j] < 0) {
            PyErr_SetString(PyExc_ValueError, "merge_hits: negative query or item");
            goto done;
        }
        if (holds(slots, mask, ((int64_t)more_query[j] << 32) | more_item[j]))
            continue;
        out_query[written] = more_query[j];
        out_item[written] = more_item[j];
        written++;
    }
    result = PyLong_FromSsize_t(written);
done:
    free(slots);
    PyBuffer_Release(&q_b);
    PyBuffer_Release(&i_b);
    PyBuffer_Release(&mq_b);
    PyBuffer_Release(&mi_b);
    PyBuffer_Release(&oq_b);
    PyBuffer_Release(&oi_b);
    return result;
}

static PyMethodDef methods[] = {
    {"search", search, METH_VARARGS, search_doc},
    {"alignment_costs", alignment_costs, METH_VARARGS, align_doc},
    {"g2p_decode", g2p_decode, METH_VARARGS, g2p_doc},
    {"word_spans", word_spans, METH_VARARGS, spans_doc},
    {"pair_screen", pair_screen, METH_VARARGS, screen_doc},
    {"pair_finish", pair_finish, METH_VARARGS, finish_doc},
    {"pool_pairs", pool_pairs, METH_VARARGS, pool_doc},
    {"merge_hits", merge_hits, METH_VARARGS, merge_doc},
    {NULL, NULL, 0, NULL},
};

static struct PyModuleDef module = {
    PyModuleDef_HEAD_INIT, "_lexfast", "Compiled kernels of the lexicon stage (see _lexfast.c).", -1, methods,
};

/* Raised when a kernel's arguments change, so stages/lexicon/sound/kernels.py can tell a module
   built from an older _lexfast.c (and fall back to numpy) instead of calling it wrongly.
   2: alignment_costs takes separate insertion and deletion costs; 3: pair_screen and pair_finish;
   4: pool_pairs and merge_hits. */
#define KERNELS_VERSION 5

PyMODINIT_FUNC PyInit__lexfast(void) {
    attr_phones = PyUnicode_InternFromString("phones");
    attr_text = PyUnicode_InternFromString("text");
    attr_keys = PyUnicode_InternFromString("keys");
    attr_entry = PyUnicode_InternFromString("entry");
    if (!attr_phones || !attr_text || !attr_keys || !attr_entry)
        return NULL;
    PyObject *m = PyModule_Create(&module);
    if (m != NULL && PyModule_AddIntConstant(m, "version", KERNELS_VERSION) < 0) {
        Py_DECREF(m);
        return NULL;
    }
    return m;
}
