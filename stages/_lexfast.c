/* Compiled kernels of the lexicon stage: phone n-gram retrieval and feature-weighted alignment.

   Both give the same results as the numpy code they stand in for (stages/phone_index.py
   PhoneIndex._search_numpy and stages/phonetics.py _batch_alignment_cost_numpy), bit for bit:
   every float operation is done in the same precision and order, and the module is built with
   -ffp-contract=off so no multiply-add is fused. Arrays come in and go out through the buffer
   protocol (the typed wrappers in Python allocate them), so the build needs no numpy headers.
   The GIL is held throughout: a call takes well under a millisecond, and the index's scratch
   counters may then be shared by every caller. */

#define PY_SSIZE_T_CLEAN
#include <Python.h>
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

/* Adds value to an open-addressing set of `mask + 1` slots (empty slots hold -1); whether it was new. */
static inline int add_once(int64_t *slots, Py_ssize_t mask, int64_t value) {
    Py_ssize_t at = (Py_ssize_t)(((uint64_t)value * 0x9E3779B97F4A7C15ull) >> 32) & mask;
    while (slots[at] != -1) {
        if (slots[at] == value)
            return 0;
        at = (at + 1) & mask;
    }
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
"       out_query, out_item, out_score, char_base, phones, base, offset4) -> int\n\n"
"Up to k items per query by Dice score of shared phone 3- and 4-grams; writes the hits into\n"
"the out buffers grouped by query, best first, and returns how many. counts and touched are\n"
"int32 scratch arrays of one element per indexed string; counts must be zero and is left so.");

static PyObject *search(PyObject *self, PyObject *args) {
    PyObject *queries;
    Py_buffer lookup_b, offsets_b, postings_b, sizes_b, counts_b, touched_b, oq_b, oi_b, os_b;
    double least_size, min_score;
    Py_ssize_t k;
    int char_base, phones, base;
    long long offset4;
    if (!PyArg_ParseTuple(args, "Oy*y*y*y*w*w*dndw*w*w*iiiL", &queries, &lookup_b, &offsets_b, &postings_b,
                          &sizes_b, &counts_b, &touched_b, &least_size, &k, &min_score, &oq_b, &oi_b, &os_b,
                          &char_base, &phones, &base, &offset4))
        return NULL;
    PyObject *result = NULL, *fast = NULL;
    int64_t *grams = NULL, *slots = NULL;
    int32_t *codes = NULL, *columns = NULL;
    Candidate *best = NULL;
    Py_ssize_t count, longest;
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
        if (read_codes(items[q], codes + 1, length, char_base, phones) < 0)
            goto done;
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
    return result;
}

PyDoc_STRVAR(align_doc,
"alignment_costs(a, b, substitution, indel, stride, char_base, out) -> None\n\n"
"Least total cost of turning a[i] into b[i] for every i, written to the float32 buffer out.\n"
"substitution is a float32 stride x stride matrix and indel a float32 vector of stride costs,\n"
"indexed by phone code; the arithmetic is float32 in the order of the numpy batch version.");

static PyObject *alignment_costs(PyObject *self, PyObject *args) {
    PyObject *a, *b;
    Py_buffer sub_b, indel_b, out_b;
    int stride, char_base;
    if (!PyArg_ParseTuple(args, "OOy*y*iiw*", &a, &b, &sub_b, &indel_b, &stride, &char_base, &out_b))
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
        check_size(&indel_b, stride, 4, "indel") < 0 || check_size(&out_b, count_a, 4, "out") < 0)
        goto done;
    const float *sub = sub_b.buf, *indel = indel_b.buf;
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
        /* cum[j]: cost of inserting the first j phones of b, summed left to right in float32 */
        cum[0] = 0.0f;
        for (Py_ssize_t j = 0; j < m; j++)
            cum[j + 1] = cum[j] + indel[ys[j]];
        memcpy(row, cum, sizeof(float) * (size_t)(m + 1));
        for (Py_ssize_t i = 0; i < n; i++) {
            const float drop = indel[xs[i]];
            const float *costs = sub + (Py_ssize_t)xs[i] * stride;
            /* Fill from the row above (delete or substitute), then resolve insertions along the
               row by a running minimum of (value - cum), as the vectorised version does. */
            float running = (row[0] + drop) - cum[0];
            next[0] = running + cum[0];
            for (Py_ssize_t j = 1; j <= m; j++) {
                float deleted = row[j] + drop;
                float substituted = row[j - 1] + costs[ys[j - 1]];
                float value = substituted < deleted ? substituted : deleted;
                float lowered = value - cum[j];
                if (lowered < running)
                    running = lowered;
                next[j] = running + cum[j];
            }
            float *swap = row;
            row = next;
            next = swap;
        }
        out[p] = row[m];
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
    PyBuffer_Release(&indel_b);
    PyBuffer_Release(&out_b);
    return result;
}

static PyMethodDef methods[] = {
    {"search", search, METH_VARARGS, search_doc},
    {"alignment_costs", alignment_costs, METH_VARARGS, align_doc},
    {NULL, NULL, 0, NULL},
};

static struct PyModuleDef module = {
    PyModuleDef_HEAD_INIT, "_lexfast", "Compiled kernels of the lexicon stage (see _lexfast.c).", -1, methods,
};

PyMODINIT_FUNC PyInit__lexfast(void) {
    return PyModule_Create(&module);
}
