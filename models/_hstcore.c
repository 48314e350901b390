/* The inner loops of half-space trees (models/hst.py) as plain C loops: the padded split rule of a build
 * (HalfSpaceTrees._draw_padded), the walk of one vector down every tree (HalfSpaceTrees._path; squash_walk also
 * builds the service model's squashed vector first, HalfSpaceTrees._squashed_path), and one window's masses and
 * calibration history (score_path, learn_path, history_learn, tail_rank).
 *
 * The build.
 * The numpy form draws one level of every tree at a time, about fifteen array operations a level on arrays
 * of a few hundred elements, so a build costs a few hundred microseconds of call overhead; this loop does the
 * same arithmetic node by node. Bit-identical to it: the same draws (taken from the one array that
 * Generator.random filled, in the same positions), the same cumulative sum (one addition after another in
 * feature order, as numpy's cumsum), the same comparisons and the same expressions for the split,
 * ``low + (high - low) * (padding + (1 - 2 * padding) * draw)``. Compiled with -ffp-contract=off so no
 * multiply-add is fused (that would round once instead of twice). tests/models/test_models_hst.py checks
 * every tree against the plain level-by-level form.
 *
 * Draw positions: level L (n = 2**L nodes a tree, T trees) starts at 2 * T * (n - 1); its first block of
 * T * n draws picks the features (tree t, node j at t * n + j), the second places the splits.
 */
#define PY_SSIZE_T_CLEAN
#include <Python.h>
#include <math.h>
#include <stdint.h>
#include <string.h>

static int get_buffer(PyObject *obj, Py_buffer *view, const char *what, Py_ssize_t items, int writable) {
    if (PyObject_GetBuffer(obj, view, PyBUF_C_CONTIGUOUS | PyBUF_FORMAT | (writable ? PyBUF_WRITABLE : 0)) < 0)
        return -1;
    const char *fmt = view->format ? view->format : "B";
    int ok;
    if (strcmp(what, "float32") == 0)
        ok = view->itemsize == 4 && view->len == items * 4 && strcmp(fmt, "f") == 0;
    else if (strcmp(what, "intp") == 0)
        ok = view->itemsize == (Py_ssize_t)sizeof(Py_ssize_t) && view->len == items * view->itemsize &&
             (strcmp(fmt, "l") == 0 || strcmp(fmt, "q") == 0 || strcmp(fmt, "n") == 0);
    else
        ok = view->itemsize == 8 && view->len == items * 8 &&
             (strcmp(what, "int64") == 0 ? (strcmp(fmt, "l") == 0 || strcmp(fmt, "q") == 0) : strcmp(fmt, "d") == 0);
    if (!ok) {
        PyErr_Format(PyExc_ValueError, "expected %zd contiguous %s values", items, what);
        PyBuffer_Release(view);
        return -1;
    }
    return 0;
}

/* draw_padded(draws, low, high, trees, height, padding, feature_out, threshold_out) */
static PyObject *draw_padded(PyObject *module, PyObject *args) {
    PyObject *o_draws, *o_low, *o_high, *o_feature, *o_threshold;
    Py_ssize_t trees, height;
    double padding;
    if (!PyArg_ParseTuple(args, "OOOnndOO", &o_draws, &o_low, &o_high, &trees, &height, &padding, &o_feature,
                          &o_threshold))
        return NULL;
    if (trees < 1 || height < 1 || height > 24) {
        PyErr_SetString(PyExc_ValueError, "trees >= 1 and 1 <= height <= 24");
        return NULL;
    }
    Py_ssize_t internal = ((Py_ssize_t)1 << height) - 1;
    Py_buffer vd, vl, vh, vf, vt;
    if (PyObject_GetBuffer(o_low, &vl, PyBUF_C_CONTIGUOUS | PyBUF_FORMAT) < 0) return NULL;
    Py_ssize_t n_f = vl.len / 8;
    PyBuffer_Release(&vl);
    if (n_f < 1) {
        PyErr_SetString(PyExc_ValueError, "at least one feature");
        return NULL;
    }
    if (get_buffer(o_draws, &vd, "float64", 2 * trees * internal, 0) < 0) return NULL;
    if (get_buffer(o_low, &vl, "float64", n_f, 0) < 0) goto fail_d;
    if (get_buffer(o_high, &vh, "float64", n_f, 0) < 0) goto fail_l;
    if (get_buffer(o_feature, &vf, "int64", trees * internal, 1) < 0) goto fail_h;
    if (get_buffer(o_threshold, &vt, "float64", trees * internal, 1) < 0) goto fail_f;

    const double *draws = vd.buf, *low0 = vl.buf, *high0 = vh.buf;
    long long *feature = vf.buf;
    double *threshold = vt.buf;
    /* The ranges of every internal node of one tree, heap order (the leaves' ranges are never used). */
    double *lo = PyMem_Malloc((size_t)(internal * n_f) * sizeof(double));
    double *hi = PyMem_Malloc((size_t)(internal * n_f) * sizeof(double));
    double *cum = PyMem_Malloc((size_t)n_f * sizeof(double));
    if (lo == NULL || hi == NULL || cum == NULL) {
        PyMem_Free(lo);
        PyMem_Free(hi);
        PyMem_Free(cum);
        PyErr_NoMemory();
        goto fail_t;
    }
    const double scale = 1.0 - 2.0 * padding;
    for (Py_ssize_t t = 0; t < trees; t++) {
        memcpy(lo, low0, (size_t)n_f * sizeof(double));
        memcpy(hi, high0, (size_t)n_f * sizeof(double));
        for (Py_ssize_t level = 0; level < height; level++) {
            Py_ssize_t n = (Py_ssize_t)1 << level;
            Py_ssize_t pos = 2 * trees * (n - 1);
            for (Py_ssize_t j = 0; j < n; j++) {
                Py_ssize_t i = n - 1 + j;
                const double *l = lo + i * n_f, *h = hi + i * n_f;
                double total = 0.0;
                for (Py_ssize_t k = 0; k < n_f; k++) {
                    double w = h[k] - l[k];
                    total = k == 0 ? w : total + w;
                    cum[k] = total;
                }
                double u = draws[pos + t * n + j] * cum[n_f - 1];
                Py_ssize_t f = 0;
                for (Py_ssize_t k = 0; k < n_f; k++) f += cum[k] <= u;
                if (f > n_f - 1) f = n_f - 1;
                double place = padding + scale * draws[pos + trees * n + t * n + j];
                double a = l[f];
                double at = a + (h[f] - a) * place;
                feature[t * internal + i] = f;
                threshold[t * internal + i] = at;
                if (level == height - 1) continue;
                /* Children: both start with this node's ranges; the left one's high and the right one's
                 * low of feature f become the split. */
                Py_ssize_t left = 2 * i + 1, right = 2 * i + 2;
                memcpy(lo + left * n_f, l, (size_t)n_f * sizeof(double));
                memcpy(hi + left * n_f, h, (size_t)n_f * sizeof(double));
                memcpy(lo + right * n_f, l, (size_t)n_f * sizeof(double));
                memcpy(hi + right * n_f, h, (size_t)n_f * sizeof(double));
                hi[left * n_f + f] = at;
                lo[right * n_f + f] = at;
            }
        }
    }
    PyMem_Free(lo);
    PyMem_Free(hi);
    PyMem_Free(cum);
    PyBuffer_Release(&vt);
    PyBuffer_Release(&vf);
    PyBuffer_Release(&vh);
    PyBuffer_Release(&vl);
    PyBuffer_Release(&vd);
    Py_RETURN_NONE;
fail_t:
    PyBuffer_Release(&vt);
fail_f:
    PyBuffer_Release(&vf);
fail_h:
    PyBuffer_Release(&vh);
fail_l:
    PyBuffer_Release(&vl);
fail_d:
    PyBuffer_Release(&vd);
    return NULL;
}

/* The split features (uint8, uint16 or uint32 of shape (trees, internal)) of walk and squash_walk, as a buffer;
 * returns the item size, or -1 with an error set and nothing held. */
static int get_feature(PyObject *o_feature, Py_buffer *vf, Py_ssize_t trees, Py_ssize_t internal) {
    if (PyObject_GetBuffer(o_feature, vf, PyBUF_C_CONTIGUOUS | PyBUF_FORMAT) < 0) return -1;
    const char *ff = vf->format ? vf->format : "B";
    int fsize = (int)vf->itemsize;
    if (vf->len != trees * internal * fsize || !((fsize == 1 && strcmp(ff, "B") == 0) || (fsize == 2 && strcmp(ff, "H") == 0) ||
                                                  (fsize == 4 && strcmp(ff, "I") == 0))) {
        PyErr_SetString(PyExc_ValueError, "feature must be contiguous uint8, uint16 or uint32 of shape (trees, internal)");
        PyBuffer_Release(vf);
        return -1;
    }
    return fsize;
}

/* Checks walk's and squash_walk's sizes (0, or -1 with an error set). */
static int check_shape(Py_ssize_t trees, Py_ssize_t height, Py_ssize_t n_nodes) {
    if (trees < 1 || height < 1 || height > 24 || n_nodes != ((Py_ssize_t)2 << height) - 1) {
        PyErr_SetString(PyExc_ValueError, "trees >= 1, 1 <= height <= 24, n_nodes = 2 ** (height + 1) - 1");
        return -1;
    }
    return 0;
}

/* The walk of v (n_f values) down every tree into path: 0, or -1 with an error set. A node sends v right when
 * v[feature] >= threshold (the float32 threshold widened to a double, an exact conversion, as numpy compares
 * them). */
static int walk_into(const double *v, Py_ssize_t n_f, const void *feature, int fsize, const float *threshold,
                     Py_ssize_t trees, Py_ssize_t height, Py_ssize_t n_nodes, Py_ssize_t *path) {
    Py_ssize_t internal = ((Py_ssize_t)1 << height) - 1;
    for (Py_ssize_t t = 0; t < trees; t++) {
        Py_ssize_t node = 0, base = t * internal;
        Py_ssize_t *out = path + t * (height + 1);
        out[0] = t * n_nodes;
        for (Py_ssize_t d = 1; d <= height; d++) {
            Py_ssize_t f = fsize == 1 ? ((const uint8_t *)feature)[base + node]
                         : fsize == 2 ? ((const uint16_t *)feature)[base + node]
                                      : (Py_ssize_t)((const uint32_t *)feature)[base + node];
            if (f >= n_f) {
                PyErr_SetString(PyExc_ValueError, "a split feature is beyond the vector");
                return -1;
            }
            node = 2 * node + 1 + (v[f] >= (double)threshold[base + node]);
            out[d] = t * n_nodes + node;
        }
    }
    return 0;
}

/* walk(v, feature, threshold, trees, height, n_nodes, path_out): the flat node index (tree * n_nodes +
 * node, heap order from 0) at every depth of every tree for the vector v, as HalfSpaceTrees._path gives
 * it. */
static PyObject *walk(PyObject *module, PyObject *args) {
    PyObject *o_v, *o_feature, *o_threshold, *o_path;
    Py_ssize_t trees, height, n_nodes;
    if (!PyArg_ParseTuple(args, "OOOnnnO", &o_v, &o_feature, &o_threshold, &trees, &height, &n_nodes, &o_path))
        return NULL;
    if (check_shape(trees, height, n_nodes) < 0) return NULL;
    Py_ssize_t internal = ((Py_ssize_t)1 << height) - 1;
    Py_buffer vv, vf, vt, vp;
    if (PyObject_GetBuffer(o_v, &vv, PyBUF_C_CONTIGUOUS | PyBUF_FORMAT) < 0) return NULL;
    if (vv.itemsize != 8 || strcmp(vv.format ? vv.format : "B", "d") != 0) {
        PyErr_SetString(PyExc_ValueError, "v must be contiguous float64");
        PyBuffer_Release(&vv);
        return NULL;
    }
    int fsize = get_feature(o_feature, &vf, trees, internal);
    if (fsize < 0) goto fail_v;
    if (get_buffer(o_threshold, &vt, "float32", trees * internal, 0) < 0) goto fail_f;
    if (get_buffer(o_path, &vp, "intp", trees * (height + 1), 1) < 0) goto fail_t;
    int rc = walk_into(vv.buf, vv.len / 8, vf.buf, fsize, vt.buf, trees, height, n_nodes, vp.buf);
    PyBuffer_Release(&vp);
    PyBuffer_Release(&vt);
    PyBuffer_Release(&vf);
    PyBuffer_Release(&vv);
    if (rc < 0) return NULL;
    Py_RETURN_NONE;
fail_t:
    PyBuffer_Release(&vt);
fail_f:
    PyBuffer_Release(&vf);
fail_v:
    PyBuffer_Release(&vv);
    return NULL;
}

static PyObject *s_z, *s_change, *s_scorable;

/* One float attribute of an evidence object (NaN with an error set when it is missing or not a number). */
static double attr_double(PyObject *obj, PyObject *name) {
    PyObject *v = PyObject_GetAttr(obj, name);
    if (v == NULL) return NAN;
    double d = PyFloat_CheckExact(v) ? PyFloat_AS_DOUBLE(v) : PyFloat_AsDouble(v);
    Py_DECREF(v);
    return d;
}

/* squash_walk(evidence, level_slots, change_slots, n_vec, scale, feature, threshold, trees, height, n_nodes,
 * path_out): the walk of the vector HalfSpaceTrees._squashed_path builds. It holds 0.5 everywhere except, for
 * every scorable evidence k with level_slots[k] >= 0, v[level_slots[k]] = 0.5 + 0.5 * tanh(z / scale) and
 * v[change_slots[k]] = 0.5 + 0.5 * tanh(change / scale), in the order of the evidence (a later one wins). The same
 * operations as the Python form; C's tanh is the one math.tanh calls. */
static PyObject *squash_walk(PyObject *module, PyObject *const *args, Py_ssize_t nargs) {
    if (nargs != 11) {
        PyErr_SetString(PyExc_TypeError, "squash_walk(evidence, level_slots, change_slots, n_vec, scale, feature, "
                                         "threshold, trees, height, n_nodes, path_out)");
        return NULL;
    }
    PyObject *evs = args[0], *lvl = args[1], *chg = args[2];
    if (!PyList_CheckExact(evs) || !PyList_CheckExact(lvl) || !PyList_CheckExact(chg) ||
        PyList_GET_SIZE(lvl) != PyList_GET_SIZE(evs) || PyList_GET_SIZE(chg) != PyList_GET_SIZE(evs)) {
        PyErr_SetString(PyExc_TypeError, "evidence, level_slots and change_slots: lists of one length");
        return NULL;
    }
    Py_ssize_t n_vec = PyLong_AsSsize_t(args[3]);
    double scale = PyFloat_AsDouble(args[4]);
    Py_ssize_t trees = PyLong_AsSsize_t(args[7]), height = PyLong_AsSsize_t(args[8]), n_nodes = PyLong_AsSsize_t(args[9]);
    if (PyErr_Occurred()) return NULL;
    if (n_vec < 1 || n_vec > ((Py_ssize_t)1 << 24)) {
        PyErr_SetString(PyExc_ValueError, "n_vec must be between 1 and 2 ** 24");
        return NULL;
    }
    if (check_shape(trees, height, n_nodes) < 0) return NULL;
    double stack[64];
    double *v = n_vec <= 64 ? stack : PyMem_Malloc((size_t)n_vec * sizeof(double));
    if (v == NULL) return PyErr_NoMemory();
    for (Py_ssize_t i = 0; i < n_vec; i++) v[i] = 0.5;
    PyObject *result = NULL;
    Py_ssize_t n = PyList_GET_SIZE(evs);
    for (Py_ssize_t k = 0; k < n; k++) {
        Py_ssize_t a = PyLong_AsSsize_t(PyList_GET_ITEM(lvl, k));
        if (a == -1 && PyErr_Occurred()) goto done;
        if (a < 0) continue;
        Py_ssize_t b = PyLong_AsSsize_t(PyList_GET_ITEM(chg, k));
        if (b == -1 && PyErr_Occurred()) goto done;
        if (a >= n_vec || b < 0 || b >= n_vec) {
            PyErr_SetString(PyExc_IndexError, "a slot is outside the vector");
            goto done;
        }
        PyObject *ev = PyList_GET_ITEM(evs, k);
        PyObject *flag = PyObject_GetAttr(ev, s_scorable);
        if (flag == NULL) goto done;
        int scorable = PyObject_IsTrue(flag);
        Py_DECREF(flag);
        if (scorable < 0) goto done;
        if (!scorable) continue;
        double z = attr_double(ev, s_z);
        if (PyErr_Occurred()) goto done;
        double c = attr_double(ev, s_change);
        if (PyErr_Occurred()) goto done;
        v[a] = 0.5 + 0.5 * tanh(z / scale);
        v[b] = 0.5 + 0.5 * tanh(c / scale);
    }
    Py_ssize_t internal = ((Py_ssize_t)1 << height) - 1;
    Py_buffer vf, vt, vp;
    int fsize = get_feature(args[5], &vf, trees, internal);
    if (fsize < 0) goto done;
    if (get_buffer(args[6], &vt, "float32", trees * internal, 0) < 0) {
        PyBuffer_Release(&vf);
        goto done;
    }
    if (get_buffer(args[10], &vp, "intp", trees * (height + 1), 1) < 0) {
        PyBuffer_Release(&vt);
        PyBuffer_Release(&vf);
        goto done;
    }
    int rc = walk_into(v, n_vec, vf.buf, fsize, vt.buf, trees, height, n_nodes, vp.buf);
    PyBuffer_Release(&vp);
    PyBuffer_Release(&vt);
    PyBuffer_Release(&vf);
    if (rc == 0) result = Py_NewRef(Py_None);
done:
    if (v != stack) PyMem_Free(v);
    return result;
}

/* The masses (uint8, uint16 and, if widest is 4, uint32; shape (trees, nodes)) and one window's path (intp, shape
 * (trees, height + 1)) of score_path and learn_path. Returns the masses' item size, or -1 with an error set and
 * nothing held. */
static int get_mass_path(PyObject *o_mass, PyObject *o_path, Py_buffer *vm, Py_buffer *vp, Py_ssize_t trees,
                         Py_ssize_t height, int writable, int widest) {
    if (PyObject_GetBuffer(o_mass, vm, PyBUF_C_CONTIGUOUS | PyBUF_FORMAT | (writable ? PyBUF_WRITABLE : 0)) < 0)
        return -1;
    const char *mf = vm->format ? vm->format : "B";
    int msize = (int)vm->itemsize;
    Py_ssize_t size = trees * (((Py_ssize_t)2 << height) - 1);
    if (vm->len != size * msize || !((msize == 1 && strcmp(mf, "B") == 0) || (msize == 2 && strcmp(mf, "H") == 0) ||
                                     (widest >= 4 && msize == 4 && strcmp(mf, "I") == 0))) {
        PyErr_SetString(PyExc_ValueError, widest >= 4 ? "masses must be contiguous uint8, uint16 or uint32 of shape (trees, nodes)"
                                                      : "masses must be contiguous uint8 or uint16 of shape (trees, nodes)");
        PyBuffer_Release(vm);
        return -1;
    }
    if (get_buffer(o_path, vp, "intp", trees * (height + 1), 0) < 0) {
        PyBuffer_Release(vm);
        return -1;
    }
    return msize;
}

/* score_path(r_mass, path, trees, height, size_limit) -> int: the integer mass sum of HalfSpaceTrees._score_path
 * for one window. Node k of a tree's path adds mass << k, and the walk stops after the first node whose mass is
 * under size_limit. Masses of uint8 or uint16 only (the caller keeps wider ones in Python): then the sum fits in
 * 64 bits for any height <= 24 and up to 65536 trees, so it is exact, as Python's integers are. */
static PyObject *score_path(PyObject *module, PyObject *args) {
    PyObject *o_mass, *o_path;
    Py_ssize_t trees, height;
    double limit;
    if (!PyArg_ParseTuple(args, "OOnnd", &o_mass, &o_path, &trees, &height, &limit)) return NULL;
    if (trees < 1 || trees > 65536 || height < 1 || height > 24) {
        PyErr_SetString(PyExc_ValueError, "1 <= trees <= 65536, 1 <= height <= 24");
        return NULL;
    }
    Py_buffer vm, vp;
    int msize = get_mass_path(o_mass, o_path, &vm, &vp, trees, height, 0, 2);
    if (msize < 0) return NULL;
    const Py_ssize_t *path = vp.buf, size = trees * (((Py_ssize_t)2 << height) - 1);
    unsigned long long total = 0;
    int bad = 0;
    for (Py_ssize_t t = 0; t < trees && !bad; t++) {
        const Py_ssize_t *row = path + t * (height + 1);
        for (Py_ssize_t k = 0; k <= height; k++) {
            Py_ssize_t at = row[k];
            if (at < 0 || at >= size) {
                bad = 1;
                break;
            }
            unsigned long long mass = msize == 1 ? ((const uint8_t *)vm.buf)[at] : ((const uint16_t *)vm.buf)[at];
            total += mass << k;
            if ((double)mass < limit) break;
        }
    }
    PyBuffer_Release(&vp);
    PyBuffer_Release(&vm);
    if (bad) {
        PyErr_SetString(PyExc_IndexError, "a path node is outside the mass array");
        return NULL;
    }
    return PyLong_FromUnsignedLongLong(total);
}

/* history_learn(sorted, ring, size, head, raw) -> (size, head): EmpiricalCalibrator.learn (models/calibration.py),
 * the history of the trees' raw scores, in place. Once the ring is full, the oldest value's leftmost copy leaves the
 * sorted array (searchsorted "left"); the new value goes in after any equal ones (searchsorted "right"). A binary
 * search with the same comparisons finds the same positions, so both arrays end up bit for bit as numpy's. */
static PyObject *history_learn(PyObject *module, PyObject *args) {
    PyObject *o_sorted, *o_ring;
    Py_ssize_t size, head;
    double raw;
    if (!PyArg_ParseTuple(args, "OOnnd", &o_sorted, &o_ring, &size, &head, &raw)) return NULL;
    if (isnan(raw)) {
        PyErr_SetString(PyExc_ValueError, "cannot add a NaN raw score to the calibration history");
        return NULL;
    }
    Py_buffer vs, vr;
    if (PyObject_GetBuffer(o_ring, &vr, PyBUF_C_CONTIGUOUS | PyBUF_FORMAT | PyBUF_WRITABLE) < 0) return NULL;
    Py_ssize_t capacity = vr.len / 8;
    if (vr.itemsize != 8 || strcmp(vr.format ? vr.format : "B", "d") != 0 || capacity < 1) {
        PyErr_SetString(PyExc_ValueError, "ring must be contiguous float64");
        PyBuffer_Release(&vr);
        return NULL;
    }
    if (get_buffer(o_sorted, &vs, "float64", capacity, 1) < 0) {
        PyBuffer_Release(&vr);
        return NULL;
    }
    if (size < 0 || size > capacity || head < 0 || head >= capacity) {
        PyErr_SetString(PyExc_ValueError, "size and head must lie within the capacity");
        PyBuffer_Release(&vs);
        PyBuffer_Release(&vr);
        return NULL;
    }
    double *s = vs.buf, *ring = vr.buf;
    Py_ssize_t n = size;
    if (n == capacity) {
        double old = ring[head];
        Py_ssize_t lo = 0, hi = n; /* first index with s[i] >= old */
        while (lo < hi) {
            Py_ssize_t mid = lo + (hi - lo) / 2;
            if (s[mid] < old) lo = mid + 1;
            else hi = mid;
        }
        if (lo < n - 1) memmove(s + lo, s + lo + 1, (size_t)(n - 1 - lo) * sizeof(double));
        n -= 1;
    }
    Py_ssize_t lo = 0, hi = n; /* first index with s[i] > raw */
    while (lo < hi) {
        Py_ssize_t mid = lo + (hi - lo) / 2;
        if (raw < s[mid]) hi = mid;
        else lo = mid + 1;
    }
    if (lo < n) memmove(s + lo + 1, s + lo, (size_t)(n - lo) * sizeof(double));
    s[lo] = raw;
    ring[head] = raw;
    PyBuffer_Release(&vs);
    PyBuffer_Release(&vr);
    return Py_BuildValue("nn", n + 1, (head + 1) % capacity);
}

/* learn_path(l_mass, path, trees, height): HalfSpaceTrees._learn_path's ``l_mass.ravel()[path] += 1`` for one
 * window's path (its nodes are distinct, so the fancy-indexed add is one increment each), masses of uint8, uint16
 * or uint32. A mass never exceeds the window size its type was chosen for, so nothing wraps. */
static PyObject *learn_path(PyObject *module, PyObject *args) {
    PyObject *o_mass, *o_path;
    Py_ssize_t trees, height;
    if (!PyArg_ParseTuple(args, "OOnn", &o_mass, &o_path, &trees, &height)) return NULL;
    if (trees < 1 || height < 1 || height > 24) {
        PyErr_SetString(PyExc_ValueError, "trees >= 1, 1 <= height <= 24");
        return NULL;
    }
    Py_buffer vm, vp;
    int msize = get_mass_path(o_mass, o_path, &vm, &vp, trees, height, 1, 4);
    if (msize < 0) return NULL;
    const Py_ssize_t *path = vp.buf, n = trees * (height + 1), size = trees * (((Py_ssize_t)2 << height) - 1);
    for (Py_ssize_t k = 0; k < n; k++) {
        if (path[k] < 0 || path[k] >= size) {
            PyBuffer_Release(&vp);
            PyBuffer_Release(&vm);
            PyErr_SetString(PyExc_IndexError, "a path node is outside the mass array");
            return NULL;
        }
    }
    for (Py_ssize_t k = 0; k < n; k++) {
        if (msize == 1) ((uint8_t *)vm.buf)[path[k]] += 1;
        else if (msize == 2) ((uint16_t *)vm.buf)[path[k]] += 1;
        else ((uint32_t *)vm.buf)[path[k]] += 1;
    }
    PyBuffer_Release(&vp);
    PyBuffer_Release(&vm);
    Py_RETURN_NONE;
}

/* tail_rank(sorted, size, raw, min_history, tail_min, tail_share) -> float | None: TailCalibrator.p_value
 * (models/calibration.py) where it is a rank: 1.0 below min_history values, the empirical (above + 1) / (n + 1)
 * at or below the tail level, None beyond it (the exponential tail's fit is numpy's mean of the top values, left
 * to the Python code so its rounding is numpy's). The same comparisons as searchsorted "left" find the same
 * count, and both integers are exact in a double, so the division rounds as Python's int / int does. */
static PyObject *tail_rank(PyObject *module, PyObject *args) {
    PyObject *o_sorted;
    Py_ssize_t size, min_history, tail_min;
    double raw, tail_share;
    if (!PyArg_ParseTuple(args, "Ondnnd", &o_sorted, &size, &raw, &min_history, &tail_min, &tail_share))
        return NULL;
    if (isnan(raw)) {
        PyErr_SetString(PyExc_ValueError, "cannot calibrate a NaN raw score");
        return NULL;
    }
    if (size < min_history) return PyFloat_FromDouble(1.0);
    Py_buffer vs;
    if (PyObject_GetBuffer(o_sorted, &vs, PyBUF_C_CONTIGUOUS | PyBUF_FORMAT) < 0) return NULL;
    if (vs.itemsize != 8 || strcmp(vs.format ? vs.format : "B", "d") != 0 || size < 1 || size > vs.len / 8) {
        PyErr_SetString(PyExc_ValueError, "sorted must be contiguous float64 holding at least size >= 1 values");
        PyBuffer_Release(&vs);
        return NULL;
    }
    const double *s = vs.buf;
    Py_ssize_t n = size;
    Py_ssize_t k = (Py_ssize_t)(tail_share * (double)n); /* int(): truncation, n > 0 */
    if (k < tail_min) k = tail_min;
    if (k > n - 1) k = n - 1;
    if (k < 0) k = 0; /* n == 1 with a negative tail_min: as Python, u = s[n - k - 1] must stay inside */
    double u = s[n - k - 1];
    if (!(raw <= u)) {
        PyBuffer_Release(&vs);
        Py_RETURN_NONE;
    }
    Py_ssize_t lo = 0, hi = n; /* first index with s[i] >= raw */
    while (lo < hi) {
        Py_ssize_t mid = lo + (hi - lo) / 2;
        if (s[mid] < raw) lo = mid + 1;
        else hi = mid;
    }
    PyBuffer_Release(&vs);
    return PyFloat_FromDouble((double)(n - lo + 1) / (double)(n + 1));
}

static PyMethodDef hstcore_functions[] = {
    {"draw_padded", draw_padded, METH_VARARGS,
     "draw_padded(draws, low, high, trees, height, padding, feature_out, threshold_out): the padded rule's "
     "split features and thresholds of every tree, heap order, into the two output arrays."},
    {"walk", walk, METH_VARARGS,
     "walk(v, feature, threshold, trees, height, n_nodes, path_out): the flat node index at every depth of "
     "every tree for the vector v, into path_out of shape (trees, height + 1)."},
    {"squash_walk", (PyCFunction)(void (*)(void))squash_walk, METH_FASTCALL,
     "squash_walk(evidence, level_slots, change_slots, n_vec, scale, feature, threshold, trees, height, n_nodes, "
     "path_out): the walk of the squashed vector of HalfSpaceTrees._squashed_path, into path_out."},
    {"history_learn", history_learn, METH_VARARGS,
     "history_learn(sorted, ring, size, head, raw) -> (size, head): EmpiricalCalibrator.learn in place."},
    {"tail_rank", tail_rank, METH_VARARGS,
     "tail_rank(sorted, size, raw, min_history, tail_min, tail_share) -> float | None: TailCalibrator.p_value "
     "where it is a rank; None beyond the tail level."},
    {"learn_path", learn_path, METH_VARARGS,
     "learn_path(l_mass, path, trees, height): one window's path counted in the latest masses, in place."},
    {"score_path", score_path, METH_VARARGS,
     "score_path(r_mass, path, trees, height, size_limit) -> int: the mass sum of one window's path (node k adds "
     "mass << k; the walk stops after the first node under size_limit)."},
    {NULL, NULL, 0, NULL},
};

static struct PyModuleDef hstcore_module = {
    PyModuleDef_HEAD_INIT, "models._hstcore",
    "The inner loops of half-space trees as plain C loops (used by models.hst where installed).\n"
    "\n"
    "One tree of height 1 that splits feature 0 at 0.5: a vector at 0.7 goes right (node 2).\n"
    "\n"
    ">>> import numpy as np\n"
    ">>> from models._hstcore import walk\n"
    ">>> path = np.empty((1, 2), dtype=np.intp)\n"
    ">>> walk(np.array([0.7]), np.zeros((1, 1), np.uint8), np.array([[0.5]], np.float32), 1, 1, 3, path)\n"
    ">>> path.tolist()\n"
    "[[0, 2]]\n",
    -1,
    hstcore_functions,
};

PyMODINIT_FUNC PyInit__hstcore(void) {
    s_z = PyUnicode_InternFromString("z");
    s_change = PyUnicode_InternFromString("change");
    s_scorable = PyUnicode_InternFromString("scorable");
    if (s_z == NULL || s_change == NULL || s_scorable == NULL) return NULL;
    return PyModule_Create(&hstcore_module);
}
