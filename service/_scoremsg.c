/* The score message of one closed window (service/scoremsg.py, encode_score) written in C: the same bytes as
 * orjson.dumps of the Python form's dict, for the messages that are the common case.
 *
 * Numbers. Each rounded one is round(x, 6) as Python computes it: the correctly rounded six-decimal string
 * (PyOS_double_to_string, 'f', the dtoa that float.__round__ uses) read back as the nearest double. A float is
 * then written with Python's shortest round-trip digits (repr) in orjson's layout: plain decimals for a decimal
 * exponent from -5 to 15, otherwise d.ddde+NN / d.ddde-N (no zero padding of a negative exponent). That layout is
 * orjson's, not a standard's, so service/scoremsg.py uses this encoder only after it has written a set of probe
 * numbers exactly as the installed orjson does (and tests/test_score_message.py compares whole messages).
 *
 * Anything else goes back to the caller as None, and the Python form encodes it: a string that is not plain
 * printable ASCII (orjson's escapes are then needed), a number that is not finite (orjson writes null), a count that
 * is not an int, a threshold that is not a float. */
#define PY_SSIZE_T_CLEAN
#include <Python.h>
#include <string.h>

/* The message being written: in the caller's stack buffer `first` until it outgrows it, then on the heap. */
typedef struct {
    char *buf, *first;
    Py_ssize_t len, cap;
} Out;

static int put(Out *o, const char *s, Py_ssize_t n) {
    if (o->len + n > o->cap) {
        Py_ssize_t cap = o->cap * 2 > o->len + n ? o->cap * 2 : o->len + n + 256;
        char *b = o->buf == o->first ? PyMem_Malloc((size_t)cap) : PyMem_Realloc(o->buf, (size_t)cap);
        if (b == NULL) {
            PyErr_NoMemory();
            return -1;
        }
        if (o->buf == o->first) memcpy(b, o->buf, (size_t)o->len);
        o->buf = b;
        o->cap = cap;
    }
    memcpy(o->buf + o->len, s, (size_t)n);
    o->len += n;
    return 0;
}

#define PUT_LIT(o, lit) put((o), (lit), (Py_ssize_t)(sizeof(lit) - 1))

/* 1 written, 0 not plain printable ASCII (the caller falls back), -1 error. */
static int put_string(Out *o, PyObject *s) {
    if (!PyUnicode_Check(s) || !PyUnicode_IS_ASCII(s)) return 0;
    const char *c = (const char *)PyUnicode_DATA(s);
    Py_ssize_t n = PyUnicode_GET_LENGTH(s);
    for (Py_ssize_t i = 0; i < n; i++)
        if (c[i] < 0x20 || c[i] == '"' || c[i] == '\\' || c[i] == 0x7f) return 0;
    if (PUT_LIT(o, "\"") < 0 || put(o, c, n) < 0 || PUT_LIT(o, "\"") < 0) return -1;
    return 1;
}

/* |x| * 10^6, rounded to the nearest integer as the exact product would be, in *k; 0 where that cannot be told
 * from the double product (|x| * 10^6 from 2^52 up, or within a few units in its last place of a half, where the
 * product's own rounding could have moved it across), and then the caller takes the dtoa route. Away from those
 * halves the exact product and the double one (within half a unit in the last place) round to the same integer,
 * and that integer divided by 10^6 (both exact, one correctly rounded division) is the double nearest to the
 * six-decimal result, which is what round(x, 6) returns. */
static int scaled6(double x, double *k) {
    double y = fabs(x) * 1e6;
    if (!(y < 4503599627370496.0)) return 0; /* 2^52 */
    double f = floor(y), frac = y - f; /* exact: both are multiples of y's last place */
    double ulp = nextafter(y, INFINITY) - y;
    if (fabs(frac - 0.5) <= 4.0 * ulp) return 0;
    *k = frac > 0.5 ? f + 1.0 : f;
    return 1;
}

/* Python's round(x, 6) of a finite double (-1.0 with an error set on failure: check PyErr_Occurred). */
static double round6(double x) {
    double k;
    if (scaled6(x, &k)) return copysign(k / 1e6, x);
    char *text = PyOS_double_to_string(x, 'f', 6, 0, NULL);
    if (text == NULL) return -1.0;
    double r = PyOS_string_to_double(text, NULL, NULL);
    PyMem_Free(text);
    return r;
}

/* A finite double in orjson's layout (see the top of the file). 1 written, 0 not finite, -1 error. */
static int put_double(Out *o, double x) {
    if (!isfinite(x)) return 0;
    char *r = PyOS_double_to_string(x, 'r', 0, Py_DTSF_ADD_DOT_0, NULL);
    if (r == NULL) return -1;
    int rc = 1;
    char *e = strchr(r, 'e');
    if (e == NULL || e[1] == '+') {
        /* Plain decimals (repr's layout from 1e-4 to below 1e16), or a positive exponent: orjson's too. */
        if (put(o, r, (Py_ssize_t)strlen(r)) < 0) rc = -1;
    } else {
        /* e-NN: the mantissa's digits and the exponent. */
        long exp10 = strtol(e + 1, NULL, 10); /* negative */
        const char *m = r;
        if (*m == '-') {
            if (PUT_LIT(o, "-") < 0) rc = -1;
            m++;
        }
        if (rc > 0 && exp10 == -5) {
            /* orjson writes 1e-05 as 0.00001: "0.0000" and then every digit of the mantissa. */
            if (PUT_LIT(o, "0.0000") < 0) rc = -1;
            for (const char *p = m; rc > 0 && p < e; p++)
                if (*p != '.' && put(o, p, 1) < 0) rc = -1;
        } else if (rc > 0) {
            char tail[8];
            int n = snprintf(tail, sizeof tail, "e-%ld", -exp10);
            if (put(o, m, (Py_ssize_t)(e - m)) < 0 || put(o, tail, n) < 0) rc = -1;
        }
    }
    PyMem_Free(r);
    return rc;
}

/* round(x, 6) of a finite double, written. Where round(x, 6) is k / 10^6 with k = 0 or 100 <= k < 10^15, its
 * repr is k's decimal digits with the point six from the right and trailing zeros dropped (at most 15 significant
 * digits: the double nearest that decimal reads back as no other decimal of 15 digits or fewer, so no shorter
 * string is its repr), in plain layout (1e-4 <= |value| < 1e9) in Python and orjson alike: written here without
 * dtoa. Otherwise through round6 and put_double. 1 written, -1 error. */
static int put_rounded_double(Out *o, double x) {
    double k;
    if (scaled6(x, &k) && k < 1e15 && (k == 0.0 || k >= 100.0)) {
        char digits[40], *p = digits + sizeof digits;
        unsigned long long n = (unsigned long long)k, whole = n / 1000000ULL, part = n % 1000000ULL;
        int places = 6;
        while (places > 1 && part % 10ULL == 0) { /* trailing zeros dropped, one digit kept */
            part /= 10ULL;
            places--;
        }
        for (int i = 0; i < places; i++) {
            *--p = (char)('0' + part % 10ULL);
            part /= 10ULL;
        }
        *--p = '.';
        do {
            *--p = (char)('0' + whole % 10ULL);
            whole /= 10ULL;
        } while (whole);
        if (signbit(x)) *--p = '-'; /* round(-1e-9, 6) is -0.0, written "-0.0" by both */
        return put(o, p, (Py_ssize_t)(digits + sizeof digits - p)) < 0 ? -1 : 1;
    }
    double r = round6(x);
    if (r == -1.0 && PyErr_Occurred()) return -1;
    return put_double(o, r);
}

/* round(x, 6) of a float object, written. 1, 0 (fall back: not a float, or not finite), -1 error. */
static int put_rounded(Out *o, PyObject *v) {
    if (!PyFloat_Check(v)) return 0;
    double x = PyFloat_AS_DOUBLE(v);
    if (!isfinite(x)) return 0;
    return put_rounded_double(o, x);
}

static PyObject *s_feature, *s_observed, *s_expected, *s_deviation, *s_score, *s_raw, *s_anomalous, *s_warming_up,
    *s_contributors;

/* An attribute written as round(value, 6). 1, 0, -1 as put_rounded. */
static int put_rounded_attr(Out *o, PyObject *obj, PyObject *name) {
    PyObject *v = PyObject_GetAttr(obj, name);
    if (v == NULL) return -1;
    int rc = put_rounded(o, v);
    Py_DECREF(v);
    return rc;
}

static int put_flag_attr(Out *o, PyObject *obj, PyObject *name) {
    PyObject *v = PyObject_GetAttr(obj, name);
    if (v == NULL) return -1;
    int t = PyObject_IsTrue(v);
    Py_DECREF(v);
    if (t < 0) return -1;
    return (t ? PUT_LIT(o, "true") : PUT_LIT(o, "false")) < 0 ? -1 : 1;
}

/* One contributor: {"feature", "metric" (the feature up to its last dot, or the feature), "observed", "expected",
 * "deviation"}. 1, 0, -1. */
static int put_contributor(Out *o, PyObject *c) {
    PyObject *feature = PyObject_GetAttr(c, s_feature);
    if (feature == NULL) return -1;
    int rc = 1;
    if (!PyUnicode_Check(feature) || !PyUnicode_IS_ASCII(feature)) {
        rc = 0;
        goto done;
    }
    if (PUT_LIT(o, "{\"feature\":") < 0 || (rc = put_string(o, feature)) <= 0) goto done;
    const char *f = (const char *)PyUnicode_DATA(feature);
    Py_ssize_t n = PyUnicode_GET_LENGTH(feature), dot = n;
    while (dot > 0 && f[dot - 1] != '.') dot--;
    Py_ssize_t metric_len = dot > 1 ? dot - 1 : n; /* rpartition(".")[0] or feature */
    if (PUT_LIT(o, ",\"metric\":\"") < 0 || put(o, f, metric_len) < 0 || PUT_LIT(o, "\",\"observed\":") < 0) {
        rc = -1;
        goto done;
    }
    if ((rc = put_rounded_attr(o, c, s_observed)) <= 0) goto done;
    if (PUT_LIT(o, ",\"expected\":") < 0) {
        rc = -1;
        goto done;
    }
    if ((rc = put_rounded_attr(o, c, s_expected)) <= 0) goto done;
    if (PUT_LIT(o, ",\"deviation\":") < 0) {
        rc = -1;
        goto done;
    }
    if ((rc = put_rounded_attr(o, c, s_deviation)) <= 0) goto done;
    if (PUT_LIT(o, "}") < 0) rc = -1;
done:
    Py_DECREF(feature);
    return rc;
}

/* encode(schema_version, service, window_start, window_end, count, kind, threshold, assessment) -> bytes or None.
 * window_start and window_end are the RFC 3339 texts; assessment a models.Assessment (score, raw, anomalous,
 * warming_up, contributors). */
static PyObject *encode(PyObject *module, PyObject *const *args, Py_ssize_t nargs) {
    if (nargs != 8) {
        PyErr_SetString(PyExc_TypeError,
                        "encode(schema_version, service, window_start, window_end, count, kind, threshold, assessment)");
        return NULL;
    }
    PyObject *version = args[0], *count = args[4], *threshold = args[6], *a = args[7];
    if (!PyLong_CheckExact(version) || !PyLong_CheckExact(count) || !PyFloat_CheckExact(threshold))
        Py_RETURN_NONE;
    long long v = PyLong_AsLongLong(version), k = PyLong_AsLongLong(count);
    if ((v == -1 || k == -1) && PyErr_Occurred()) {
        if (!PyErr_ExceptionMatches(PyExc_OverflowError)) return NULL;
        PyErr_Clear();
        Py_RETURN_NONE; /* a count beyond 64 bits: orjson's to judge */
    }
    char stack[1024];
    Out o = {stack, stack, 0, sizeof stack};
    int rc = 1;
    char num[32];
    PyObject *contributors = NULL;
#define STEP(expr)                 \
    do {                           \
        if ((rc = (expr)) <= 0) goto done; \
    } while (0)
#define LIT(lit) STEP(PUT_LIT(&o, lit) < 0 ? -1 : 1)
    LIT("{\"schema_version\":");
    STEP(put(&o, num, snprintf(num, sizeof num, "%lld", v)) < 0 ? -1 : 1);
    LIT(",\"service\":");
    STEP(put_string(&o, args[1]));
    LIT(",\"window_start\":");
    STEP(put_string(&o, args[2]));
    LIT(",\"window_end\":");
    STEP(put_string(&o, args[3]));
    LIT(",\"score\":");
    STEP(put_rounded_attr(&o, a, s_score));
    LIT(",\"anomalous\":");
    STEP(put_flag_attr(&o, a, s_anomalous));
    LIT(",\"threshold\":");
    STEP(put_double(&o, PyFloat_AS_DOUBLE(threshold)));
    LIT(",\"warming_up\":");
    STEP(put_flag_attr(&o, a, s_warming_up));
    LIT(",\"model\":");
    STEP(put_string(&o, args[5]));
    LIT(",\"count\":");
    STEP(put(&o, num, snprintf(num, sizeof num, "%lld", k)) < 0 ? -1 : 1);
    LIT(",\"raw_score\":");
    STEP(put_rounded_attr(&o, a, s_raw));
    LIT(",\"contributors\":[");
    contributors = PyObject_GetAttr(a, s_contributors);
    if (contributors == NULL) {
        rc = -1;
        goto done;
    }
    PyObject *seq = PySequence_Fast(contributors, "contributors must be a sequence");
    if (seq == NULL) {
        rc = -1;
        goto done;
    }
    Py_ssize_t n = PySequence_Fast_GET_SIZE(seq);
    for (Py_ssize_t i = 0; i < n && rc > 0; i++) {
        if (i > 0 && PUT_LIT(&o, ",") < 0) rc = -1;
        if (rc > 0) rc = put_contributor(&o, PySequence_Fast_GET_ITEM(seq, i));
    }
    Py_DECREF(seq);
    if (rc <= 0) goto done;
    LIT("]}");
#undef LIT
#undef STEP
done:
    Py_XDECREF(contributors);
    PyObject *result = NULL;
    if (rc > 0) result = PyBytes_FromStringAndSize(o.buf, o.len);
    else if (rc == 0) result = Py_NewRef(Py_None);
    if (o.buf != stack) PyMem_Free(o.buf);
    return result;
}

/* One float through `put` (put_double or put_rounded_double) as bytes, None where it is not finite. */
static PyObject *written(PyObject *arg, int (*put_one)(Out *, double)) {
    double x = PyFloat_AsDouble(arg);
    if (x == -1.0 && PyErr_Occurred()) return NULL;
    if (!isfinite(x)) Py_RETURN_NONE;
    char stack[64];
    Out o = {stack, stack, 0, sizeof stack};
    int rc = put_one(&o, x);
    PyObject *result = rc > 0 ? PyBytes_FromStringAndSize(o.buf, o.len) : rc == 0 ? Py_NewRef(Py_None) : NULL;
    if (o.buf != stack) PyMem_Free(o.buf);
    return result;
}

/* number(x) -> bytes or None: one float written as the message writes a threshold (for the probe and the tests). */
static PyObject *number(PyObject *module, PyObject *arg) { return written(arg, put_double); }

/* rounded_number(x) -> bytes or None: round(x, 6) written as the message writes a score or a contributor's
 * number (for the probe and the tests). */
static PyObject *rounded_number(PyObject *module, PyObject *arg) { return written(arg, put_rounded_double); }

/* rounded(x) -> float: Python's round(x, 6), as the message computes it. */
static PyObject *rounded(PyObject *module, PyObject *arg) {
    double x = PyFloat_AsDouble(arg);
    if (x == -1.0 && PyErr_Occurred()) return NULL;
    if (!isfinite(x)) return PyFloat_FromDouble(x);
    double r = round6(x);
    if (r == -1.0 && PyErr_Occurred()) return NULL;
    return PyFloat_FromDouble(r);
}

static PyMethodDef scoremsg_functions[] = {
    {"encode", (PyCFunction)(void (*)(void))encode, METH_FASTCALL,
     "encode(schema_version, service, window_start, window_end, count, kind, threshold, assessment) -> bytes or "
     "None: the score message, or None where the Python form must write it."},
    {"number", number, METH_O, "number(x) -> bytes or None: a finite float in the message's (orjson's) layout."},
    {"rounded", rounded, METH_O, "rounded(x) -> float: round(x, 6) as the message computes it."},
    {"rounded_number", rounded_number, METH_O,
     "rounded_number(x) -> bytes or None: round(x, 6) of a finite float in the message's (orjson's) layout."},
    {NULL, NULL, 0, NULL},
};

static struct PyModuleDef scoremsg_module = {
    PyModuleDef_HEAD_INIT, "service._scoremsg",
    "The score message written in C (used by service.scoremsg where installed and where it agrees with orjson).\n"
    "\n"
    ">>> from service._scoremsg import number, rounded\n"
    ">>> number(2.5e-05), number(1e-06), number(1e16), number(float('inf'))\n"
    "(b'0.000025', b'1e-6', b'1e+16', None)\n"
    ">>> rounded(0.1234565), rounded(2.0000004)\n"
    "(0.123456, 2.0)\n"
    ">>> rounded_number(-1234.5678901), rounded_number(-1e-9), rounded_number(3e-06)\n"
    "(b'-1234.56789', b'-0.0', b'3e-6')\n",
    -1,
    scoremsg_functions,
};

PyMODINIT_FUNC PyInit__scoremsg(void) {
    static const char *const names[] = {"feature", "observed", "expected", "deviation", "score", "raw",
                                        "anomalous", "warming_up", "contributors"};
    PyObject **slots[] = {&s_feature, &s_observed, &s_expected, &s_deviation, &s_score, &s_raw,
                          &s_anomalous, &s_warming_up, &s_contributors};
    for (size_t i = 0; i < sizeof names / sizeof names[0]; i++) {
        *slots[i] = PyUnicode_InternFromString(names[i]);
        if (*slots[i] == NULL) return NULL;
    }
    return PyModule_Create(&scoremsg_module);
}
