/* SeasonalBaseline.compare (models/seasonal.py) as a C loop: the evidence of one window, feature by feature.
 *
 * The Python method is the reference and the fallback; this is the same code, line for line, on the same
 * statistics (the baseline's Python lists of floats and its array('d') / array('H') profiles, read in place),
 * with the same operations in the same order and the same libm functions CPython's math module calls (sqrt,
 * exp, log1p, erfc, pow), compiled with -ffp-contract=off so no multiply-add is fused. The one call back into
 * Python is the normal deviate of a stuck run's chance (tail_deviate, NormalDist.inv_cdf), which only a
 * repeated value needs. tests/models/test_models_fast_paths.py compares every field of every Evidence with the
 * Python method's, bit for bit, over streams with cycles, spikes, held values, repeats and stuck runs.
 *
 * The constants come from models.seasonal through configure() at import, so they have one home.
 */
#define PY_SSIZE_T_CLEAN
#include <Python.h>
#include <structmember.h>
#include <math.h>
#include <stdint.h>
#include <string.h>

static struct {
    double prefer_simpler, mad_to_sd, z_limit, stuck_prior_repeats, stuck_max_rate, stuck_prior_runs,
        stuck_direct_rate, drift_clip, drift_lambda, drift_var0_prior, tail_prior_windows, gauss_rate_prior,
        gauss_excess_prior, tail_prior_events, tail_level, sqrt2, hold_rate;
    int ready;
} K;

/* The statistics compare reads, in this order (each a list, one entry per feature position). */
static const char *const FLOAT_NAMES[] = {"level", "off_day", "off_week", "err0", "err1", "err2", "ew", "ew2",
                                          "err1b", "dscale", "last", "rep", "repw", "rpend", "ez", "ez2", "ezw",
                                          "rr", "rrw", "xr", "xw", "xn", "xe", "yr", "yw", "yn", "ye", "held", "sr"};
enum {
    F_LEVEL, F_OFF_D, F_OFF_W, F_ERR0, F_ERR1, F_ERR2, F_EW, F_EW2, F_ERR1B, F_DSCALE, F_LAST, F_REP, F_REPW,
    F_RPEND, F_EZ, F_EZ2, F_EZW, F_RR, F_RRW, F_XR, F_XW, F_XN, F_XE, F_YR, F_YW, F_YN, F_YE, F_HELD, F_SR, N_FLOATS
};
static const char *const INT_NAMES[] = {"count", "run", "away"};
enum { I_COUNT, I_RUN, I_AWAY, N_INTS };

static PyObject *float_keys[N_FLOATS], *int_keys[N_INTS];
static PyObject *s_f, *s_i, *s_day, *s_day_n, *s_week, *s_week_n, *s_names, *s_absolute_floor,
    *s_relative_floor, *s_expected, *s_z, *s_change, *s_stuck, *s_scorable, *s_p, *s_drift,
    *s_held;

static int configure_from(PyObject *d) {
#define GET(field, key)                                                     \
    do {                                                                    \
        PyObject *v = PyDict_GetItemString(d, key);                         \
        if (v == NULL) {                                                    \
            PyErr_Format(PyExc_KeyError, "configure: missing %s", key);     \
            return -1;                                                      \
        }                                                                   \
        K.field = PyFloat_AsDouble(v);                                      \
        if (K.field == -1.0 && PyErr_Occurred()) return -1;                 \
    } while (0)
    GET(prefer_simpler, "PREFER_SIMPLER");
    GET(mad_to_sd, "MAD_TO_SD");
    GET(z_limit, "Z_LIMIT");
    GET(stuck_prior_repeats, "STUCK_PRIOR_REPEATS");
    GET(stuck_max_rate, "STUCK_MAX_RATE");
    GET(stuck_prior_runs, "STUCK_PRIOR_RUNS");
    GET(stuck_direct_rate, "STUCK_DIRECT_RATE");
    GET(drift_clip, "DRIFT_CLIP");
    GET(drift_lambda, "DRIFT_LAMBDA");
    GET(drift_var0_prior, "_DRIFT_VAR0_PRIOR");
    GET(tail_prior_windows, "TAIL_PRIOR_WINDOWS");
    GET(gauss_rate_prior, "_GAUSS_RATE_PRIOR");
    GET(gauss_excess_prior, "_GAUSS_EXCESS_PRIOR");
    GET(tail_prior_events, "TAIL_PRIOR_EVENTS");
    GET(tail_level, "TAIL_LEVEL");
    GET(sqrt2, "_SQRT2");
    GET(hold_rate, "HOLD_RATE");
#undef GET
    K.ready = 1;
    return 0;
}

static PyObject *configure(PyObject *module, PyObject *d) {
    if (!PyDict_Check(d)) {
        PyErr_SetString(PyExc_TypeError, "configure(constants: dict)");
        return NULL;
    }
    if (configure_from(d) < 0) return NULL;
    Py_RETURN_NONE;
}

static inline double as_double(PyObject *o) {
    return PyFloat_CheckExact(o) ? PyFloat_AS_DOUBLE(o) : PyFloat_AsDouble(o);
}

/* Entry i of a list of floats (PyFloat_AsDouble sets an error for anything else). */
#define FV(k, i) as_double(PyList_GET_ITEM(fl[k], (i)))

/* Where a dataclass(slots=True) instance keeps its fields: each field is a member descriptor holding an object
 * at a byte offset of the instance. A map holds those offsets, in field order, for the one class seen last; an
 * instance of exactly that class has its fields read and written at them, as the descriptors themselves do,
 * without looking the attribute up through the type each time. Any other object goes through the attribute
 * protocol. Two maps: Evidence (built by compare, read by summarise and learn_evidence) and Contribution. */
typedef struct {
    PyTypeObject *type;
    int n;
    PyObject **keys;
    Py_ssize_t off[8];
} SlotMap;

static PyObject *ev_names[8], *contrib_names[4];
static SlotMap ev_map = {NULL, 8, ev_names, {0}}, contrib_map = {NULL, 4, contrib_names, {0}};

/* 1 when `type`'s fields are plain object slots (their offsets now in the map), 0 when not, -1 on error. */
static int map_slots(SlotMap *map, PyTypeObject *type) {
    if (type == map->type) return 1;
    Py_ssize_t off[8];
    for (int k = 0; k < map->n; k++) {
        PyObject *d = PyDict_GetItemWithError(type->tp_dict, map->keys[k]);
        if (d == NULL) return PyErr_Occurred() ? -1 : 0;
        if (!Py_IS_TYPE(d, &PyMemberDescr_Type)) return 0;
        PyMemberDef *m = ((PyMemberDescrObject *)d)->d_member;
        if (m->type != T_OBJECT_EX || (m->flags & READONLY) || m->offset <= 0 ||
            m->offset + (Py_ssize_t)sizeof(PyObject *) > type->tp_basicsize)
            return 0;
        off[k] = m->offset;
    }
    memcpy(map->off, off, sizeof(Py_ssize_t) * (size_t)map->n);
    Py_INCREF(type);
    Py_XSETREF(map->type, type);
    return 1;
}

/* A new instance of `type` with its fields set to `vals` (references stolen, NULL for a failed allocation). */
static PyObject *new_slotted(SlotMap *map, PyTypeObject *type, PyObject **vals) {
    int direct = map_slots(map, type);
    PyObject *obj = direct < 0 ? NULL : type->tp_alloc(type, 0);
    int failed = obj == NULL;
    for (int k = 0; k < map->n; k++) {
        if (vals[k] == NULL) {
            failed = 1;
        } else if (!failed && direct) {
            /* A fresh object's slots are empty: the reference moves in. */
            *(PyObject **)((char *)obj + map->off[k]) = vals[k];
            continue;
        } else if (!failed && PyObject_SetAttr(obj, map->keys[k], vals[k]) < 0) {
            failed = 1;
        }
        Py_XDECREF(vals[k]);
    }
    if (failed) {
        Py_XDECREF(obj);
        return NULL;
    }
    return obj;
}

#define EV_SLOT(obj, k) ((PyObject **)((char *)(obj) + ev_map.off[k]))

/* A new Evidence without running its Python __init__: object.__new__, then each slot set. */
static PyObject *evidence(PyObject *cls, double expected, double z, double change, double stuck, int scorable,
                          double p, double drift, int held) {
    PyObject *vals[8] = {PyFloat_FromDouble(expected), PyFloat_FromDouble(z), PyFloat_FromDouble(change),
                         PyFloat_FromDouble(stuck), PyBool_FromLong(scorable), PyFloat_FromDouble(p),
                         PyFloat_FromDouble(drift), PyBool_FromLong(held)};
    return new_slotted(&ev_map, (PyTypeObject *)cls, vals);
}

/* Row i of a profile (array('d') or array('H') of `width` entries), as a buffer; writable for the update. */
static int read_row(PyObject *rows, Py_ssize_t i, Py_buffer *view, const char *fmt, Py_ssize_t width, int writable) {
    PyObject *row = PyList_GET_ITEM(rows, i);
    if (PyObject_GetBuffer(row, view, PyBUF_C_CONTIGUOUS | PyBUF_FORMAT | (writable ? PyBUF_WRITABLE : 0)) < 0)
        return -1;
    if (strcmp(view->format ? view->format : "B", fmt) != 0 || view->len != width * view->itemsize) {
        PyBuffer_Release(view);
        PyErr_SetString(PyExc_ValueError, "malformed profile row");
        return -1;
    }
    return 0;
}


/* (hour, how, next_hour, next_how, w) from models.seasonal.blend_of, checked. */
static int parse_blend(PyObject *blend, Py_ssize_t *hour, Py_ssize_t *how, Py_ssize_t *nh, Py_ssize_t *nw, double *bw) {
    if (!PyTuple_CheckExact(blend) || PyTuple_GET_SIZE(blend) != 5) {
        PyErr_SetString(PyExc_TypeError, "blend: a 5-tuple");
        return -1;
    }
    *hour = PyLong_AsSsize_t(PyTuple_GET_ITEM(blend, 0));
    *how = PyLong_AsSsize_t(PyTuple_GET_ITEM(blend, 1));
    *nh = PyLong_AsSsize_t(PyTuple_GET_ITEM(blend, 2));
    *nw = PyLong_AsSsize_t(PyTuple_GET_ITEM(blend, 3));
    *bw = PyFloat_AsDouble(PyTuple_GET_ITEM(blend, 4));
    if (PyErr_Occurred()) return -1;
    if (*hour < 0 || *hour >= 24 || *nh < 0 || *nh >= 24 || *how < 0 || *how >= 168 || *nw < 0 || *nw >= 168) {
        PyErr_SetString(PyExc_ValueError, "blend slots out of range");
        return -1;
    }
    return 0;
}

/* A profile's prediction for feature i at `slot`: the slot's mean, drawn toward the neighbouring slot `next`
 * by bw where `smooth` and that slot has been seen, plus the profile's offset. *out is left as it is (the
 * simpler prediction) when the slot has not been seen. */
static int profile_predict(PyObject *rows, PyObject *counts, Py_ssize_t i, Py_ssize_t width, Py_ssize_t slot,
                           Py_ssize_t next, int smooth, double bw, PyObject *offset, double *out) {
    Py_buffer rn, rv;
    if (read_row(counts, i, &rn, "H", width, 0) < 0) return -1;
    const uint16_t *cnt = rn.buf;
    int have = cnt[slot] != 0, have_next = cnt[next] != 0;
    PyBuffer_Release(&rn);
    if (!have) return 0;
    if (read_row(rows, i, &rv, "d", width, 0) < 0) return -1;
    const double *row = rv.buf;
    double p = row[slot];
    if (smooth && have_next) p += bw * (row[next] - p);
    PyBuffer_Release(&rv);
    double off = as_double(offset);
    if (off == -1.0 && PyErr_Occurred()) return -1;
    *out = p + off;
    return 0;
}

/* A baseline's statistics, borrowed for one call: the dicts of lists and the profile rows, checked for
 * type and length once. */
typedef struct {
    PyObject *f, *ints, *day, *day_n, *week, *week_n, *names; /* new references */
    Py_ssize_t n_feat;
} Baseline;

static void baseline_release(Baseline *b) {
    Py_CLEAR(b->f);
    Py_CLEAR(b->ints);
    Py_CLEAR(b->day);
    Py_CLEAR(b->day_n);
    Py_CLEAR(b->week);
    Py_CLEAR(b->week_n);
    Py_CLEAR(b->names);
}

/* The lists of `keys` in `dict`, each one entry per feature. */
static int lists_of(PyObject *dict, PyObject *const *keys, const char *const *labels, int n, Py_ssize_t n_feat,
                    PyObject **out) {
    for (int k = 0; k < n; k++) {
        out[k] = PyDict_GetItemWithError(dict, keys[k]);
        if (out[k] == NULL || !PyList_CheckExact(out[k]) || PyList_GET_SIZE(out[k]) != n_feat) {
            if (!PyErr_Occurred()) PyErr_Format(PyExc_ValueError, "statistic %s missing or of the wrong length", labels[k]);
            return -1;
        }
    }
    return 0;
}

/* Fills *b and the float lists named by fkeys / the int lists; -1 with an exception (b released). */
static int baseline_acquire(PyObject *base, Baseline *b, PyObject *const *fkeys, const char *const *flabels, int nf,
                            PyObject **fl, PyObject **il) {
    memset(b, 0, sizeof(*b));
    if ((b->f = PyObject_GetAttr(base, s_f)) == NULL || (b->ints = PyObject_GetAttr(base, s_i)) == NULL ||
        (b->day = PyObject_GetAttr(base, s_day)) == NULL || (b->day_n = PyObject_GetAttr(base, s_day_n)) == NULL ||
        (b->week = PyObject_GetAttr(base, s_week)) == NULL || (b->week_n = PyObject_GetAttr(base, s_week_n)) == NULL ||
        (b->names = PyObject_GetAttr(base, s_names)) == NULL)
        goto fail;
    if (!PyDict_Check(b->f) || !PyDict_Check(b->ints) || !PyList_CheckExact(b->day) || !PyList_CheckExact(b->day_n) ||
        !PyList_CheckExact(b->week) || !PyList_CheckExact(b->week_n) || !PyList_CheckExact(b->names)) {
        PyErr_SetString(PyExc_TypeError, "not a SeasonalBaseline");
        goto fail;
    }
    b->n_feat = PyList_GET_SIZE(b->names);
    if (PyList_GET_SIZE(b->day) != b->n_feat || PyList_GET_SIZE(b->day_n) != b->n_feat ||
        PyList_GET_SIZE(b->week) != b->n_feat || PyList_GET_SIZE(b->week_n) != b->n_feat) {
        PyErr_SetString(PyExc_ValueError, "profiles of the wrong length");
        goto fail;
    }
    if (lists_of(b->f, fkeys, flabels, nf, b->n_feat, fl) < 0 ||
        lists_of(b->ints, int_keys, INT_NAMES, N_INTS, b->n_feat, il) < 0)
        goto fail;
    return 0;
fail:
    baseline_release(b);
    return -1;
}

/* compare(baseline, idx, values, use_day, use_week, blend, Evidence, tail_deviate) -> list of Evidence */
/* models.seasonal.repeats: whether this window repeats the one before (1, 0, or -1 with an error set).
 * `steady` is None (no within-window reading: equal values), or whether the metric held one value all window;
 * `steady_rare`: whether it does so in fewer than STUCK_MAX_RATE of windows. */
static int repeats(double x, double x_last, PyObject *steady, long run, int steady_rare) {
    if (steady == Py_None) return x == x_last;
    int held_through = PyObject_IsTrue(steady);
    if (held_through < 0) return -1;
    return held_through && (x == x_last || (run == 0 && steady_rare));
}

/* The optional `steady` list of compare and update_loop: None, or a list as long as idx. */
static int check_steady(PyObject *steady, Py_ssize_t n) {
    if (steady == Py_None || (PyList_CheckExact(steady) && PyList_GET_SIZE(steady) == n)) return 0;
    PyErr_SetString(PyExc_TypeError, "steady: None or a list as long as idx");
    return -1;
}

static PyObject *compare(PyObject *module, PyObject *const *args, Py_ssize_t nargs) {
    if (nargs != 9) {
        PyErr_SetString(PyExc_TypeError,
                        "compare(baseline, idx, values, use_day, use_week, blend, Evidence, tail_deviate, steady)");
        return NULL;
    }
    if (!K.ready) {
        PyErr_SetString(PyExc_RuntimeError, "configure() first");
        return NULL;
    }
    PyObject *base = args[0], *idx = args[1], *values = args[2], *blend = args[5], *ev_cls = args[6],
             *tail_deviate = args[7], *steady = args[8];
    int use_day = PyObject_IsTrue(args[3]), use_week = PyObject_IsTrue(args[4]);
    if (use_day < 0 || use_week < 0) return NULL;
    if (!PyList_CheckExact(idx) || !PyList_CheckExact(values) || PyList_GET_SIZE(idx) != PyList_GET_SIZE(values) ||
        !PyType_Check(ev_cls)) {
        PyErr_SetString(PyExc_TypeError, "idx and values: lists of one length; Evidence: a class");
        return NULL;
    }
    if (check_steady(steady, PyList_GET_SIZE(idx)) < 0) return NULL;
    Py_ssize_t hour, how, nh, nw;
    double bw;
    if (parse_blend(blend, &hour, &how, &nh, &nw, &bw) < 0) return NULL;

    PyObject *out = NULL;
    PyObject *fl[N_FLOATS], *il[N_INTS];
    double floor_abs, floor_rel;
    Baseline bl;
    {
        PyObject *v = PyObject_GetAttr(base, s_absolute_floor);
        if (v == NULL) return NULL;
        floor_abs = PyFloat_AsDouble(v);
        Py_DECREF(v);
        v = PyObject_GetAttr(base, s_relative_floor);
        if (v == NULL) return NULL;
        floor_rel = PyFloat_AsDouble(v);
        Py_DECREF(v);
        if (PyErr_Occurred()) return NULL;
    }
    if (baseline_acquire(base, &bl, float_keys, FLOAT_NAMES, N_FLOATS, fl, il) < 0) return NULL;
    PyObject *day = bl.day, *day_n = bl.day_n, *week = bl.week, *week_n = bl.week_n, *names = bl.names;
    Py_ssize_t n_feat = bl.n_feat;

    Py_ssize_t n = PyList_GET_SIZE(idx);
    out = PyList_New(n);
    if (out == NULL) goto done;
    for (Py_ssize_t j = 0; j < n; j++) {
        Py_ssize_t i = PyLong_AsSsize_t(PyList_GET_ITEM(idx, j));
        if (i == -1 && PyErr_Occurred()) goto fail;
        if (i < 0 || i >= n_feat) {
            PyErr_SetString(PyExc_IndexError, "feature position out of range");
            goto fail;
        }
        double x = as_double(PyList_GET_ITEM(values, j));
        long count = PyLong_AsLong(PyList_GET_ITEM(il[I_COUNT], i));
        if (PyErr_Occurred()) goto fail;
        PyObject *e;
        if (count == 0) {
            e = evidence(ev_cls, NAN, 0.0, 0.0, 0.0, 0, 1.0, 0.0, 0);
            if (e == NULL) goto fail;
            PyList_SET_ITEM(out, j, e);
            continue;
        }
        double p0 = FV(F_LEVEL, i);
        double e1 = FV(F_ERR1, i);
        double e1b = FV(F_ERR1B, i);
        int smooth = e1b < e1;
        if (smooth) e1 = e1b;
        double p1 = p0, p2;
        if (use_day && profile_predict(day, day_n, i, 24, hour, nh, smooth, bw, PyList_GET_ITEM(fl[F_OFF_D], i), &p1) < 0)
            goto fail;
        p2 = p1;
        if (use_week && profile_predict(week, week_n, i, 168, how, nw, smooth, bw, PyList_GET_ITEM(fl[F_OFF_W], i), &p2) < 0)
            goto fail;
        double err = FV(F_ERR0, i);
        double p = p0;
        if (e1 < K.prefer_simpler * err) {
            err = e1;
            p = p1;
        }
        double e2 = FV(F_ERR2, i);
        if (e2 < K.prefer_simpler * err) {
            err = e2;
            p = p2;
        }
        if (PyErr_Occurred()) goto fail;
        if (count < 2) {
            e = evidence(ev_cls, p, 0.0, 0.0, 0.0, 0, 1.0, 0.0, 0);
            if (e == NULL) goto fail;
            PyList_SET_ITEM(out, j, e);
            continue;
        }
        double floor = floor_abs + floor_rel * fabs(p);
        int is_count = PyUnicode_Check(PyList_GET_ITEM(names, i)) &&
                       PyUnicode_CompareWithASCIIString(PyList_GET_ITEM(names, i), "count") == 0;
        if (is_count) {
            double root = sqrt(fabs(p));
            if (root > floor) floor = root;
        }
        double sd = K.mad_to_sd * err;
        if (floor > sd) sd = floor;
        double ew = FV(F_EW, i);
        double share = FV(F_EW2, i) / (ew * ew);
        double t = (x - p) / sd;
        t = t > K.z_limit ? K.z_limit : t < -K.z_limit ? -K.z_limit : t;
        double z = 0.0;
        if (share < 1.0) {
            double tn = t / sqrt(1.0 + share);
            double dof = 1.0 / share - 1.0;
            if (!(dof <= 0.0)) {
                z = (8.0 * dof + 1.0) / (8.0 * dof + 3.0) * sqrt(dof * log1p(tn * tn / dof));
                if (!(tn >= 0.0)) z = -z;
            }
        }
        double dsd = K.mad_to_sd * FV(F_DSCALE, i);
        if (floor > dsd) dsd = floor;
        double x_last = FV(F_LAST, i);
        double c = (x - x_last) / dsd;
        c = c > K.z_limit ? K.z_limit : c < -K.z_limit ? -K.z_limit : c;
        double stuck = 0.0, p_stuck = 1.0, q = 1.0;
        double rep = FV(F_REP, i), repw = FV(F_REPW, i), rpend = FV(F_RPEND, i);
        long run = PyLong_AsLong(PyList_GET_ITEM(il[I_RUN], i));
        if (PyErr_Occurred()) goto fail;
        int same = repeats(x, x_last, steady == Py_None ? Py_None : PyList_GET_ITEM(steady, j), run,
                           (FV(F_SR, i) + 0.5) / (repw + 1.0) < K.stuck_max_rate);
        if (same < 0) goto fail;
        if (same) {
            q = (rep + K.stuck_prior_repeats) / (repw + 1.0);
            if ((rep + rpend + 0.5) / (repw + 1.0) < K.stuck_max_rate) {
                double q2 = (FV(F_RR, i) + K.stuck_prior_runs * q) / (FV(F_RRW, i) + K.stuck_prior_runs);
                /* float ** int in CPython: 1.0 for a zero exponent, else libm pow of the two doubles */
                p_stuck = q * (run == 0 ? 1.0 : pow(q2, (double)run));
                PyObject *ps = PyFloat_FromDouble(p_stuck);
                if (ps == NULL) goto fail;
                PyObject *dev = PyObject_CallOneArg(tail_deviate, ps);
                Py_DECREF(ps);
                if (dev == NULL) goto fail;
                stuck = PyFloat_AsDouble(dev);
                Py_DECREF(dev);
                if (stuck == -1.0 && PyErr_Occurred()) goto fail;
            }
        }
        double zc = z > K.drift_clip ? K.drift_clip : z < -K.drift_clip ? -K.drift_clip : z;
        double ez_i = FV(F_EZ, i);
        double drift = (ez_i + K.drift_lambda * (zc - ez_i)) /
                       sqrt((FV(F_EZ2, i) + K.drift_var0_prior) / (FV(F_EZW, i) + K.tail_prior_windows));
        double rate_x = (FV(F_XR, i) + K.gauss_rate_prior) / (FV(F_XW, i) + K.tail_prior_windows);
        double beta_x = (FV(F_XE, i) + K.gauss_excess_prior) / (FV(F_XN, i) + K.tail_prior_events);
        double gauss, over, tail;
        if (stuck > 0.0 && q >= K.stuck_direct_rate) {
            gauss = erfc(stuck / K.sqrt2);
            over = stuck - K.tail_level;
            tail = rate_x * exp(-(over > 0.0 ? over : 0.0) / beta_x);
            p_stuck = tail > gauss ? tail : gauss;
        }
        double strength = fabs(z);
        gauss = erfc(strength / K.sqrt2);
        over = strength - K.tail_level;
        tail = rate_x * exp(-(over > 0.0 ? over : 0.0) / beta_x);
        double p_z = tail > gauss ? tail : gauss;
        strength = fabs(drift);
        gauss = erfc(strength / K.sqrt2);
        over = strength - K.tail_level;
        tail = ((FV(F_YR, i) + K.gauss_rate_prior) / (FV(F_YW, i) + K.tail_prior_windows)) *
               exp(-(over > 0.0 ? over : 0.0) / ((FV(F_YE, i) + K.gauss_excess_prior) / (FV(F_YN, i) + K.tail_prior_events)));
        double p_d = 2.0 * (tail > gauss ? tail : gauss);
        double p_ev = p_z;
        if (p_d < p_ev) p_ev = p_d;
        if (p_stuck < p_ev) p_ev = p_stuck;
        int is_held = 0;
        if (!is_count) {
            double q_hold = (rep + rpend + 0.5) / (repw + 1.0);
            double held = FV(F_HELD, i);
            long away_n = PyLong_AsLong(PyList_GET_ITEM(il[I_AWAY], i));
            if (PyErr_Occurred()) goto fail;
            long away = (x == held || x == x_last) ? 0 : away_n + 1;
            if (q_hold >= K.hold_rate && away <= 1) {
                double held_p = 1.0 - q_hold;
                if (held_p > p_ev) p_ev = held_p;
                is_held = 1;
            }
        }
        if (PyErr_Occurred()) goto fail;
        e = evidence(ev_cls, p, z, c, stuck, 1, p_ev, drift, is_held);
        if (e == NULL) goto fail;
        PyList_SET_ITEM(out, j, e);
    }
    goto done;
fail:
    Py_CLEAR(out);
done:
    baseline_release(&bl);
    return out;
}

/* The statistics update_loop writes, in this order. */
static const char *const UPDATE_NAMES[] = {"level", "lw", "off_day", "off_week", "err0", "err1", "err2", "err1b",
                                           "ew", "ew2", "dscale", "dw", "rep", "repw", "rr", "rrw", "rpend",
                                           "last", "held", "sr"};
enum {
    U_LEVEL, U_LW, U_OFF_D, U_OFF_W, U_ERR0, U_ERR1, U_ERR2, U_ERR1B, U_EW, U_EW2, U_DSCALE, U_DW, U_REP, U_REPW,
    U_RR, U_RRW, U_RPEND, U_LAST, U_HELD, U_SR, N_UPDATE
};
static PyObject *update_keys[N_UPDATE];

#define UV(k, i) as_double(PyList_GET_ITEM(ul[k], (i)))

static inline int set_float(PyObject *list, Py_ssize_t i, double v) {
    PyObject *o = PyFloat_FromDouble(v);
    if (o == NULL) return -1;
    return PyList_SetItem(list, i, o); /* steals o, releases the old entry */
}

static inline int set_long(PyObject *list, Py_ssize_t i, long v) {
    PyObject *o = PyLong_FromLong(v);
    if (o == NULL) return -1;
    return PyList_SetItem(list, i, o);
}


/* update_loop(baseline, idx, values, timed, use_day, use_week, blend, a, keep, ks, kr, a_day, a_week): the
 * learning loop of SeasonalBaseline.update (the part after the tails and the drift), in place. */
static PyObject *update_loop(PyObject *module, PyObject *const *args, Py_ssize_t nargs) {
    if (nargs != 14) {
        PyErr_SetString(PyExc_TypeError,
                        "update_loop(baseline, idx, values, timed, use_day, use_week, blend, a, keep, ks, kr, a_day, a_week, "
                        "steady)");
        return NULL;
    }
    PyObject *base = args[0], *idx = args[1], *values = args[2], *blend = args[6], *steady = args[13];
    int timed = PyObject_IsTrue(args[3]), use_day = PyObject_IsTrue(args[4]), use_week = PyObject_IsTrue(args[5]);
    double a = PyFloat_AsDouble(args[7]), keep = PyFloat_AsDouble(args[8]), ks = PyFloat_AsDouble(args[9]),
           kr = PyFloat_AsDouble(args[10]), a_day = PyFloat_AsDouble(args[11]), a_week = PyFloat_AsDouble(args[12]);
    if (timed < 0 || use_day < 0 || use_week < 0 || PyErr_Occurred()) return NULL;
    if (!PyList_CheckExact(idx) || !PyList_CheckExact(values) || PyList_GET_SIZE(idx) != PyList_GET_SIZE(values)) {
        PyErr_SetString(PyExc_TypeError, "idx and values: lists of one length");
        return NULL;
    }
    if (check_steady(steady, PyList_GET_SIZE(idx)) < 0) return NULL;
    Py_ssize_t hour, how, nh, nw;
    double bw;
    if (parse_blend(blend, &hour, &how, &nh, &nw, &bw) < 0) return NULL;
    PyObject *result = NULL;
    PyObject *ul[N_UPDATE], *il[N_INTS];
    Baseline bl;
    if (baseline_acquire(base, &bl, update_keys, UPDATE_NAMES, N_UPDATE, ul, il) < 0) return NULL;
    PyObject *day = bl.day, *day_n = bl.day_n, *week = bl.week, *week_n = bl.week_n;
    Py_ssize_t n_feat = bl.n_feat;
    const double ks2 = ks * ks;
    Py_ssize_t n = PyList_GET_SIZE(idx);
    for (Py_ssize_t j = 0; j < n; j++) {
        Py_ssize_t i = PyLong_AsSsize_t(PyList_GET_ITEM(idx, j));
        if (i == -1 && PyErr_Occurred()) goto done;
        if (i < 0 || i >= n_feat) {
            PyErr_SetString(PyExc_IndexError, "feature position out of range");
            goto done;
        }
        PyObject *xo = PyList_GET_ITEM(values, j);
        double x = as_double(xo);
        long count = PyLong_AsLong(PyList_GET_ITEM(il[I_COUNT], i));
        if (PyErr_Occurred()) goto done;
        Py_buffer dv, dn, wv, wn;
        if (count == 0) {
            if (set_float(ul[U_LEVEL], i, x) < 0 || set_float(ul[U_LW], i, 1.0) < 0 || set_float(ul[U_LAST], i, x) < 0 ||
                set_float(ul[U_HELD], i, x) < 0)
                goto done;
            if (timed) {
                if (read_row(day, i, &dv, "d", 24, 1) < 0) goto done;
                ((double *)dv.buf)[hour] = x;
                PyBuffer_Release(&dv);
                if (read_row(day_n, i, &dn, "H", 24, 1) < 0) goto done;
                ((uint16_t *)dn.buf)[hour] = 1;
                PyBuffer_Release(&dn);
                if (read_row(week, i, &wv, "d", 168, 1) < 0) goto done;
                ((double *)wv.buf)[how] = x;
                PyBuffer_Release(&wv);
                if (read_row(week_n, i, &wn, "H", 168, 1) < 0) goto done;
                ((uint16_t *)wn.buf)[how] = 1;
                PyBuffer_Release(&wn);
            }
            if (set_long(il[I_COUNT], i, 1) < 0) goto done;
            continue;
        }
        if (read_row(day, i, &dv, "d", 24, 1) < 0) goto done;
        if (read_row(day_n, i, &dn, "H", 24, 1) < 0) {
            PyBuffer_Release(&dv);
            goto done;
        }
        if (read_row(week, i, &wv, "d", 168, 1) < 0) {
            PyBuffer_Release(&dv);
            PyBuffer_Release(&dn);
            goto done;
        }
        if (read_row(week_n, i, &wn, "H", 168, 1) < 0) {
            PyBuffer_Release(&dv);
            PyBuffer_Release(&dn);
            PyBuffer_Release(&wv);
            goto done;
        }
        double *drow = dv.buf, *wrow = wv.buf;
        uint16_t *dcnt = dn.buf, *wcnt = wn.buf;
        int failed = 0;
        double p0 = UV(U_LEVEL, i);
        int smooth = UV(U_ERR1B, i) < UV(U_ERR1, i);
        double s1, b1, p1, p2;
        if (use_day && dcnt[hour]) {
            s1 = b1 = drow[hour];
            if (dcnt[nh]) b1 = s1 + bw * (drow[nh] - s1);
            double off = UV(U_OFF_D, i);
            s1 += off;
            b1 += off;
        } else {
            s1 = b1 = p0;
        }
        p1 = smooth ? b1 : s1;
        if (use_week && wcnt[how]) {
            p2 = wrow[how];
            if (smooth && wcnt[nw]) p2 += bw * (wrow[nw] - p2);
            p2 += UV(U_OFF_W, i);
        } else {
            p2 = p1;
        }
        double w = ks * UV(U_EW, i) + 1.0;
        double err0 = UV(U_ERR0, i), err1 = UV(U_ERR1, i), err1b = UV(U_ERR1B, i), err2 = UV(U_ERR2, i);
        double ew2 = UV(U_EW2, i), dw = UV(U_DW, i), dscale = UV(U_DSCALE, i), x_last = UV(U_LAST, i);
        double rep = UV(U_REP, i), rpend = UV(U_RPEND, i), repw = UV(U_REPW, i);
        double lw = UV(U_LW, i), level = p0, held = UV(U_HELD, i);
        long run = PyLong_AsLong(PyList_GET_ITEM(il[I_RUN], i));
        long away = PyLong_AsLong(PyList_GET_ITEM(il[I_AWAY], i));
        if (PyErr_Occurred()) failed = 1;
        PyObject *held_through = steady == Py_None ? Py_None : PyList_GET_ITEM(steady, j);
        double sr = UV(U_SR, i);
        if (PyErr_Occurred()) failed = 1;
        int repeated = failed ? 0 : repeats(x, x_last, held_through, run, (sr + 0.5) / (repw + 1.0) < K.stuck_max_rate);
        int steady_now = failed ? 0 : PyObject_IsTrue(held_through);
        if (repeated < 0 || steady_now < 0) failed = 1;
        if (!failed) {
            err0 += (fabs(x - p0) - err0) / w;
            err1 += (fabs(x - s1) - err1) / w;
            err1b += (fabs(x - b1) - err1b) / w;
            err2 += (fabs(x - p2) - err2) / w;
            ew2 = ks2 * ew2 + 1.0;
            double wd = ks * dw + 1.0;
            dscale += (fabs(x - x_last) - dscale) / wd;
            double same = repeated ? 1.0 : 0.0;
            rep = kr * rep;
            rpend = kr * rpend + same;
            repw = kr * repw + 1.0;
            /* How often the metric holds still all window (see SeasonalBaseline.update). */
            sr = kr * sr + (steady_now ? 1.0 : 0.0);
            if (!same) {
                rep += rpend;
                rpend = 0.0;
            }
            if (run > 0 && !same) {
                /* A run of `run` repeats has ended (see SeasonalBaseline.update). */
                double rr = kr * UV(U_RR, i) + (double)(run - 1);
                double rrw = kr * UV(U_RRW, i) + (double)run;
                failed = set_float(ul[U_RR], i, rr) < 0 || set_float(ul[U_RRW], i, rrw) < 0;
            }
            run = same ? run + 1 : 0;
            if (same) held = x;
            away = x == held ? 0 : away + 1;
            double wl = keep * lw + 1.0;
            level += (x - level) / wl;
            failed = failed || set_float(ul[U_ERR0], i, err0) < 0 || set_float(ul[U_ERR1], i, err1) < 0 ||
                     set_float(ul[U_ERR1B], i, err1b) < 0 || set_float(ul[U_ERR2], i, err2) < 0 ||
                     set_float(ul[U_EW], i, w) < 0 || set_float(ul[U_EW2], i, ew2) < 0 ||
                     set_float(ul[U_DSCALE], i, dscale) < 0 || set_float(ul[U_DW], i, wd) < 0 ||
                     set_float(ul[U_REP], i, rep) < 0 || set_float(ul[U_RPEND], i, rpend) < 0 ||
                     set_float(ul[U_REPW], i, repw) < 0 || set_float(ul[U_SR], i, sr) < 0 ||
                     set_long(il[I_RUN], i, run) < 0 ||
                     set_float(ul[U_HELD], i, held) < 0 || set_long(il[I_AWAY], i, away) < 0 ||
                     set_float(ul[U_LAST], i, x) < 0 || set_float(ul[U_LEVEL], i, level) < 0 ||
                     set_float(ul[U_LW], i, wl) < 0;
            if (!failed && timed) {
                /* Offsets follow the level's pace; each slot keeps a slowly forgetting mean. */
                unsigned nd = dcnt[hour];
                if (nd) {
                    double off = UV(U_OFF_D, i);
                    off += a * ((x - drow[hour]) - off);
                    failed = set_float(ul[U_OFF_D], i, off) < 0;
                    double rate = 1.0 / (double)(nd + 1);
                    drow[hour] += (rate > a_day ? rate : a_day) * (x - drow[hour]);
                } else {
                    drow[hour] = x;
                }
                dcnt[hour] = (uint16_t)(nd < 65535 ? nd + 1 : 65535);
                unsigned seen = wcnt[how];
                if (seen) {
                    double off = UV(U_OFF_W, i);
                    off += a * ((x - wrow[how]) - off);
                    failed = failed || set_float(ul[U_OFF_W], i, off) < 0;
                    double rate = 1.0 / (double)(seen + 1);
                    wrow[how] += (rate > a_week ? rate : a_week) * (x - wrow[how]);
                } else {
                    wrow[how] = x;
                }
                wcnt[how] = (uint16_t)(seen < 65535 ? seen + 1 : 65535);
            }
            if (!failed) failed = set_long(il[I_COUNT], i, count + 1) < 0;
        }
        PyBuffer_Release(&dv);
        PyBuffer_Release(&dn);
        PyBuffer_Release(&wv);
        PyBuffer_Release(&wn);
        if (failed || PyErr_Occurred()) goto done;
    }
    result = Py_None;
    Py_INCREF(result);
done:
    baseline_release(&bl);
    return result;
}

/* The statistics learn_evidence writes: the two tails, then the running drift. */
static const char *const LEARN_NAMES[] = {"xr", "xw", "xn", "xe", "yr", "yw", "yn", "ye", "ez", "ez2", "ezw"};
enum { L_XR, L_XW, L_XN, L_XE, L_YR, L_YW, L_YN, L_YE, L_EZ, L_EZ2, L_EZW, N_LEARN };
static PyObject *learn_keys[N_LEARN];

/* One attribute of an Evidence as a double (-1.0 with an error set when it is not a number). */
/* The slot of field `name` of an instance of exactly the class ev_slots mapped (a borrowed reference, NULL where
 * the slot is empty or the object is another kind: the attribute protocol then reads it, and raises). */
static inline PyObject *ev_borrow(PyObject *ev, PyObject *name) {
    if (ev_map.type == NULL || !Py_IS_TYPE(ev, ev_map.type)) return NULL;
    for (int k = 0; k < 8; k++)
        if (ev_names[k] == name) return *EV_SLOT(ev, k);
    return NULL;
}

static double ev_double(PyObject *ev, PyObject *name) {
    PyObject *v = ev_borrow(ev, name);
    if (v != NULL) return as_double(v);
    v = PyObject_GetAttr(ev, name);
    if (v == NULL) return -1.0;
    double d = as_double(v);
    Py_DECREF(v);
    return d;
}

static int ev_flag(PyObject *ev, PyObject *name) {
    PyObject *v = ev_borrow(ev, name);
    if (v != NULL) return PyObject_IsTrue(v);
    v = PyObject_GetAttr(ev, name);
    if (v == NULL) return -1;
    int t = PyObject_IsTrue(v);
    Py_DECREF(v);
    return t;
}

/* learn_evidence(baseline, idx, evidence, k, kd, drift): SeasonalBaseline.learn_tail with forgetting factor k and,
 * with drift, the running-drift update of SeasonalBaseline.update (factor kd), in place. Each feature's statistics
 * depend on that feature alone, so one pass does what the two Python loops do one after the other. */
static PyObject *learn_evidence(PyObject *module, PyObject *const *args, Py_ssize_t nargs) {
    if (nargs != 6) {
        PyErr_SetString(PyExc_TypeError, "learn_evidence(baseline, idx, evidence, k, kd, drift)");
        return NULL;
    }
    if (!K.ready) {
        PyErr_SetString(PyExc_RuntimeError, "configure() first");
        return NULL;
    }
    PyObject *base = args[0], *idx = args[1], *evs = args[2];
    double k = PyFloat_AsDouble(args[3]), kd = PyFloat_AsDouble(args[4]);
    int with_drift = PyObject_IsTrue(args[5]);
    if (with_drift < 0 || PyErr_Occurred()) return NULL;
    if (!PyList_CheckExact(idx) || !PyList_CheckExact(evs) || PyList_GET_SIZE(idx) != PyList_GET_SIZE(evs)) {
        PyErr_SetString(PyExc_TypeError, "idx and evidence: lists of one length");
        return NULL;
    }
    PyObject *ll[N_LEARN], *il[N_INTS];
    Baseline bl;
    if (baseline_acquire(base, &bl, learn_keys, LEARN_NAMES, N_LEARN, ll, il) < 0) return NULL;
    PyObject *result = NULL;
    Py_ssize_t n = PyList_GET_SIZE(idx);
#define LV(key, i) as_double(PyList_GET_ITEM(ll[key], (i)))
    for (Py_ssize_t j = 0; j < n; j++) {
        Py_ssize_t i = PyLong_AsSsize_t(PyList_GET_ITEM(idx, j));
        if (i == -1 && PyErr_Occurred()) goto done;
        if (i < 0 || i >= bl.n_feat) {
            PyErr_SetString(PyExc_IndexError, "feature position out of range");
            goto done;
        }
        PyObject *ev = PyList_GET_ITEM(evs, j);
        int scorable = ev_flag(ev, s_scorable);
        if (scorable < 0) goto done;
        if (!scorable) continue;
        int held = ev_flag(ev, s_held);
        if (held < 0) goto done;
        double z = ev_double(ev, s_z);
        if (z == -1.0 && PyErr_Occurred()) goto done;
        if (!held) {
            double drift = ev_double(ev, s_drift);
            if (drift == -1.0 && PyErr_Occurred()) goto done;
            /* A held feature's change has no measured size (see HOLD_RATE): it teaches no tail. */
            double excess = fabs(z) - K.tail_level;
            int hit = excess > 0.0;
            double xr = k * LV(L_XR, i) + (hit ? 1.0 : 0.0), xw = k * LV(L_XW, i) + 1.0;
            double xn = k * LV(L_XN, i) + (hit ? 1.0 : 0.0), xe = k * LV(L_XE, i) + (hit ? excess : 0.0);
            excess = fabs(drift) - K.tail_level;
            hit = excess > 0.0;
            double yr = k * LV(L_YR, i) + (hit ? 1.0 : 0.0), yw = k * LV(L_YW, i) + 1.0;
            double yn = k * LV(L_YN, i) + (hit ? 1.0 : 0.0), ye = k * LV(L_YE, i) + (hit ? excess : 0.0);
            if (PyErr_Occurred() || set_float(ll[L_XR], i, xr) < 0 || set_float(ll[L_XW], i, xw) < 0 ||
                set_float(ll[L_XN], i, xn) < 0 || set_float(ll[L_XE], i, xe) < 0 || set_float(ll[L_YR], i, yr) < 0 ||
                set_float(ll[L_YW], i, yw) < 0 || set_float(ll[L_YN], i, yn) < 0 || set_float(ll[L_YE], i, ye) < 0)
                goto done;
        }
        if (with_drift) {
            double zc = z > K.drift_clip ? K.drift_clip : z < -K.drift_clip ? -K.drift_clip : z;
            double ez = LV(L_EZ, i);
            ez += K.drift_lambda * (zc - ez);
            double ez2 = kd * LV(L_EZ2, i) + ez * ez, ezw = kd * LV(L_EZW, i) + 1.0;
            if (PyErr_Occurred() || set_float(ll[L_EZ], i, ez) < 0 || set_float(ll[L_EZ2], i, ez2) < 0 ||
                set_float(ll[L_EZW], i, ezw) < 0)
                goto done;
        }
    }
#undef LV
    result = Py_None;
    Py_INCREF(result);
done:
    baseline_release(&bl);
    return result;
}

/* One scorable feature of summarise's ranking. */
typedef struct {
    double p, strength;
    PyObject *name; /* borrowed */
    Py_ssize_t i;
} Ranked;

/* Whether a goes before b: rarer first (p), then the stronger evidence, then the name (code point order, as
 * Python compares str). 1, 0, or -1 with an error set. */
static int ranked_before(const Ranked *a, const Ranked *b) {
    if (a->p != b->p) return a->p < b->p;
    if (a->strength != b->strength) return a->strength > b->strength;
    int c = PyUnicode_Compare(a->name, b->name);
    if (c == -1 && PyErr_Occurred()) return -1;
    return c < 0;
}

/* summarise(evidence, names, k) -> (p_min, scorable, order) or None: for ServiceModel.assess, the smallest p of
 * the scorable evidence (1.0 if none) and how many are scorable, and the positions of at most k of them with a
 * strength max(|z|, stuck) above 0, rarest first, then the strongest, then by name (the order of
 * ServiceModel._contributors). None (the caller's Python loops decide) when a p or a strength is NaN, where the
 * order of a Python sort is not a plain comparison's. */
static PyObject *summarise(PyObject *module, PyObject *const *args, Py_ssize_t nargs) {
    if (nargs != 3) {
        PyErr_SetString(PyExc_TypeError, "summarise(evidence, names, k)");
        return NULL;
    }
    PyObject *evs = args[0], *names = args[1];
    Py_ssize_t k = PyLong_AsSsize_t(args[2]);
    if (k == -1 && PyErr_Occurred()) return NULL;
    if (!PyList_CheckExact(evs) || !PyList_CheckExact(names) || PyList_GET_SIZE(evs) != PyList_GET_SIZE(names) || k < 0) {
        PyErr_SetString(PyExc_TypeError, "evidence and names: lists of one length; k >= 0");
        return NULL;
    }
    Py_ssize_t n = PyList_GET_SIZE(evs);
    Ranked stack[32];
    Ranked *r = n <= 32 ? stack : PyMem_Malloc((size_t)n * sizeof(Ranked));
    if (r == NULL) return PyErr_NoMemory();
    PyObject *result = NULL;
    double p_min = 1.0;
    Py_ssize_t scorable = 0, m = 0;
    for (Py_ssize_t i = 0; i < n; i++) {
        PyObject *ev = PyList_GET_ITEM(evs, i);
        int ok = ev_flag(ev, s_scorable);
        if (ok < 0) goto done;
        if (!ok) continue;
        double p = ev_double(ev, s_p);
        if (p == -1.0 && PyErr_Occurred()) goto done;
        double z = ev_double(ev, s_z);
        if (z == -1.0 && PyErr_Occurred()) goto done;
        double stuck = ev_double(ev, s_stuck);
        if (stuck == -1.0 && PyErr_Occurred()) goto done;
        double strength = stuck > fabs(z) ? stuck : fabs(z); /* max(abs(z), stuck), as the builtin picks it */
        if (isnan(p) || isnan(z) || isnan(stuck)) {
            result = Py_NewRef(Py_None);
            goto done;
        }
        if (scorable == 0 || p < p_min) p_min = p;
        scorable++;
        if (strength > 0.0) {
            PyObject *name = PyList_GET_ITEM(names, i);
            if (!PyUnicode_Check(name)) {
                PyErr_SetString(PyExc_TypeError, "names must be str");
                goto done;
            }
            /* Insertion into the sorted prefix: stable, and a window has a handful of features. */
            Ranked item = {p, strength, name, i};
            Py_ssize_t j = m;
            while (j > 0) {
                int before = ranked_before(&item, &r[j - 1]);
                if (before < 0) goto done;
                if (!before) break;
                r[j] = r[j - 1];
                j--;
            }
            r[j] = item;
            m++;
        }
    }
    Py_ssize_t take = m < k ? m : k;
    PyObject *order = PyList_New(take);
    if (order == NULL) goto done;
    for (Py_ssize_t j = 0; j < take; j++) {
        PyObject *pos = PyLong_FromSsize_t(r[j].i);
        if (pos == NULL) {
            Py_DECREF(order);
            goto done;
        }
        PyList_SET_ITEM(order, j, pos);
    }
    result = Py_BuildValue("(dnN)", p_min, scorable, order);
done:
    if (r != stack) PyMem_Free(r);
    return result;
}

/* contributions(Contribution, names, values, evidence, order) -> list: ServiceModel.assess's
 * [Contribution(names[i], values[i], evidence[i].expected, evidence[i].z) for i in order], the very same objects in
 * each field. */
static PyObject *contributions(PyObject *module, PyObject *const *args, Py_ssize_t nargs) {
    if (nargs != 5) {
        PyErr_SetString(PyExc_TypeError, "contributions(Contribution, names, values, evidence, order)");
        return NULL;
    }
    PyObject *cls = args[0], *names = args[1], *values = args[2], *evs = args[3], *order = args[4];
    if (!PyType_Check(cls) || !PyList_CheckExact(names) || !PyList_CheckExact(values) || !PyList_CheckExact(evs) ||
        !PyList_CheckExact(order) || PyList_GET_SIZE(values) != PyList_GET_SIZE(names) ||
        PyList_GET_SIZE(evs) != PyList_GET_SIZE(names)) {
        PyErr_SetString(PyExc_TypeError, "Contribution: a class; names, values and evidence: lists of one length; "
                                         "order: a list");
        return NULL;
    }
    Py_ssize_t m = PyList_GET_SIZE(order), n = PyList_GET_SIZE(names);
    PyObject *out = PyList_New(m);
    if (out == NULL) return NULL;
    for (Py_ssize_t j = 0; j < m; j++) {
        Py_ssize_t i = PyLong_AsSsize_t(PyList_GET_ITEM(order, j));
        if (i == -1 && PyErr_Occurred()) goto fail;
        if (i < 0 || i >= n) {
            PyErr_SetString(PyExc_IndexError, "contributor position out of range");
            goto fail;
        }
        PyObject *ev = PyList_GET_ITEM(evs, i);
        PyObject *expected = ev_borrow(ev, s_expected), *z = ev_borrow(ev, s_z);
        expected = expected != NULL ? Py_NewRef(expected) : PyObject_GetAttr(ev, s_expected);
        z = z != NULL ? Py_NewRef(z) : expected == NULL ? NULL : PyObject_GetAttr(ev, s_z);
        PyObject *vals[4] = {Py_NewRef(PyList_GET_ITEM(names, i)), Py_NewRef(PyList_GET_ITEM(values, i)),
                             expected, z};
        PyObject *c = new_slotted(&contrib_map, (PyTypeObject *)cls, vals);
        if (c == NULL) goto fail;
        PyList_SET_ITEM(out, j, c);
    }
    return out;
fail:
    Py_DECREF(out);
    return NULL;
}

static PyMethodDef baselinecore_functions[] = {
    {"configure", configure, METH_O, "configure(constants): the constants of models.seasonal, once at import."},
    {"compare", (PyCFunction)(void (*)(void))compare, METH_FASTCALL,
     "compare(baseline, idx, values, use_day, use_week, blend, Evidence, tail_deviate, steady): "
     "SeasonalBaseline.compare's list of Evidence."},
    {"update_loop", (PyCFunction)(void (*)(void))update_loop, METH_FASTCALL,
     "update_loop(baseline, idx, values, timed, use_day, use_week, blend, a, keep, ks, kr, a_day, a_week, steady): "
     "the learning loop of SeasonalBaseline.update, in place."},
    {"learn_evidence", (PyCFunction)(void (*)(void))learn_evidence, METH_FASTCALL,
     "learn_evidence(baseline, idx, evidence, k, kd, drift): SeasonalBaseline.learn_tail and, with drift, the "
     "running drift of SeasonalBaseline.update, in place."},
    {"summarise", (PyCFunction)(void (*)(void))summarise, METH_FASTCALL,
     "summarise(evidence, names, k) -> (p_min, scorable, order) or None: the smallest p and the count of the "
     "scorable evidence, and the positions of the k strongest contributors in ServiceModel's order."},
    {"contributions", (PyCFunction)(void (*)(void))contributions, METH_FASTCALL,
     "contributions(Contribution, names, values, evidence, order) -> list: the contributors of a window."},
    {NULL, NULL, 0, NULL},
};

static struct PyModuleDef baselinecore_module = {
    PyModuleDef_HEAD_INIT, "models._baselinecore",
    "SeasonalBaseline.compare as a C loop (used by models.seasonal where installed).\n"
    "\n"
    "It reads a baseline's statistics in place and returns the same Evidence as the Python method\n"
    "(SeasonalBaseline._compare):\n"
    "\n"
    ">>> from models.seasonal import SeasonalBaseline\n"
    ">>> from models import _baselinecore\n"
    ">>> base = SeasonalBaseline(24.0)\n"
    ">>> for k in range(50):\n"
    "...     base.learn_one({\"x\": 10.0 + k % 3})\n"
    ">>> idx = base.locate([\"x\"])\n"
    ">>> ev = base.compare(idx, [30.0], None)[0]\n"
    ">>> ev.scorable, round(ev.expected, 2), ev.z > 10\n"
    "(True, 10.98, True)\n"
    ">>> base.compare(idx, [30.0], None) == base._compare(idx, [30.0], None)\n"
    "True\n",
    -1, baselinecore_functions,
};

PyMODINIT_FUNC PyInit__baselinecore(void) {
    for (int k = 0; k < N_FLOATS; k++)
        if ((float_keys[k] = PyUnicode_InternFromString(FLOAT_NAMES[k])) == NULL) return NULL;
    for (int k = 0; k < N_INTS; k++)
        if ((int_keys[k] = PyUnicode_InternFromString(INT_NAMES[k])) == NULL) return NULL;
    for (int k = 0; k < N_UPDATE; k++)
        if ((update_keys[k] = PyUnicode_InternFromString(UPDATE_NAMES[k])) == NULL) return NULL;
    for (int k = 0; k < N_LEARN; k++)
        if ((learn_keys[k] = PyUnicode_InternFromString(LEARN_NAMES[k])) == NULL) return NULL;
#define NAME(var, text) \
    if ((var = PyUnicode_InternFromString(text)) == NULL) return NULL;
    NAME(s_f, "_f")
    NAME(s_i, "_i")
    NAME(s_day, "_day")
    NAME(s_day_n, "_day_n")
    NAME(s_week, "_week")
    NAME(s_week_n, "_week_n")
    NAME(s_names, "_names")
    NAME(s_absolute_floor, "absolute_floor")
    NAME(s_relative_floor, "relative_floor")
    NAME(s_expected, "expected")
    NAME(s_z, "z")
    NAME(s_change, "change")
    NAME(s_stuck, "stuck")
    NAME(s_scorable, "scorable")
    NAME(s_p, "p")
    NAME(s_drift, "drift")
    NAME(s_held, "held")
    NAME(contrib_names[0], "feature")
    NAME(contrib_names[1], "observed")
    NAME(contrib_names[2], "expected")
    NAME(contrib_names[3], "deviation")
#undef NAME
    PyObject *ev_fields[8] = {s_expected, s_z, s_change, s_stuck, s_scorable, s_p, s_drift, s_held};
    memcpy(ev_names, ev_fields, sizeof ev_fields);
    return PyModule_Create(&baselinecore_module);
}
