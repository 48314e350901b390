/* The per-message hot path of Engine.feed in C: decode a native message and add it to its open window.
 *
 * This is an accelerator, not a second implementation: it takes only the lines it can fully check
 * and that need nothing but the common case, and hands every other line back to the Python loop
 * (service/engine.py), which then does exactly what it does without this module. The common case:
 *
 *   - a JSON object of ASCII text without escapes, whose keys are "service", "ts", "metrics" and
 *     optionally "labels", each at most once;
 *   - "service" a printable string within the length limit, of a service already owned by this
 *     source and whose settings are resolved;
 *   - "ts" a number (epoch seconds, or milliseconds above MS_THRESHOLD) or an RFC 3339 time of the form
 *     YYYY-MM-DDTHH:MM:SS[.f] (1 to 6 digits) with Z, +HH:MM, -HH:MM or no zone, within the accepted range;
 *   - "metrics" a non-empty object of numbers within the metrics limit, no name twice;
 *   - "labels" absent, null or a flat object of strings, numbers, booleans and nulls, no key twice;
 *   - the message's window is open already and has seen every one of its metrics, or the window is new (then it
 *     is opened here as SourceWindows.add opens one).
 *
 * Anything else (a reject, another form of time, a new service, a new metric in a window,
 * an integer of 19 digits or more) stops the scan at that line, before anything is changed, so the
 * Python path sees it exactly as it would have. Numbers become the objects orjson would give (int for
 * an integer literal, float otherwise, parsed by CPython's own correctly rounded conversion), and are
 * appended to the window's lists in message order, as SourceWindows.add does.
 *
 * No Python code runs while a batch is scanned (dict and set operations on str keys stay in C), so
 * the source's high mark is kept in a local and written back once, when the scan returns.
 */
#define PY_SSIZE_T_CLEAN
#include <Python.h>
#include <math.h>
#include <stdint.h>
#include <string.h>

/* Metrics of one message handled here; a message with more goes to the Python path. */
#define MAX_FAST_METRICS 64
/* Longest number literal handled here (a longer one is valid JSON, just not common). */
#define MAX_NUMBER_CHARS 40
/* The interning table stops taking new names past this many (memory stays bounded; names past it
 * are made afresh each time, which is slower and still correct). */
#define MAX_INTERNED (1 << 20)

typedef const unsigned char *cursor;

typedef struct {
    PyObject *str; /* owned; NULL = empty slot */
    uint64_t hash;
} Slot;

typedef struct {
    PyObject_HEAD
    Slot *slots;
    size_t cap; /* a power of two */
    size_t used;
    double min_ts;       /* service.decode.MIN_EVENT_TS */
    double ms_threshold; /* service.timefmt.MS_THRESHOLD */
    PyObject *window_type; /* service.windows.Window, to open new windows (NULL: hand them back) */
    PyObject *heappush;    /* heapq.heappush (the C one) */
} Scanner;

static PyObject *s_open, *s_heap, *s_touched, *s_high_mark, *s_values, *s_count, *s_start, *s_end, *s_window,
    *s_lateness, *s_max_message_bytes, *s_max_service_name, *s_max_metrics, *s_ceiling;

/* ------------------------------------------------------------------ interning */

static uint64_t fnv1a(cursor s, Py_ssize_t n) {
    uint64_t h = 1469598103934665603ULL;
    for (Py_ssize_t i = 0; i < n; i++) {
        h ^= s[i];
        h *= 1099511628211ULL;
    }
    return h;
}

static int grow(Scanner *self) {
    size_t cap = self->cap ? self->cap * 2 : 4096;
    Slot *slots = PyMem_Calloc(cap, sizeof(Slot));
    if (slots == NULL) {
        PyErr_NoMemory();
        return -1;
    }
    for (size_t i = 0; i < self->cap; i++) {
        if (self->slots[i].str != NULL) {
            size_t j = self->slots[i].hash & (cap - 1);
            while (slots[j].str != NULL) j = (j + 1) & (cap - 1);
            slots[j] = self->slots[i];
        }
    }
    PyMem_Free(self->slots);
    self->slots = slots;
    self->cap = cap;
    return 0;
}

/* A borrowed str for the ASCII bytes s[0:n]: the same object every time while the table has room
 * (dict lookups then hit on identity, with the hash already cached), a new reference otherwise
 * (*owned set to 1). NULL with an exception on failure. */
static PyObject *intern_ascii(Scanner *self, cursor s, Py_ssize_t n, int *owned) {
    *owned = 0;
    uint64_t h = fnv1a(s, n);
    if (self->cap) {
        size_t j = h & (self->cap - 1);
        while (self->slots[j].str != NULL) {
            PyObject *u = self->slots[j].str;
            if (self->slots[j].hash == h && PyUnicode_GET_LENGTH(u) == n && memcmp(PyUnicode_DATA(u), s, (size_t)n) == 0)
                return u;
            j = (j + 1) & (self->cap - 1);
        }
    }
    PyObject *u = PyUnicode_FromStringAndSize((const char *)s, n);
    if (u == NULL) return NULL;
    if (self->used >= MAX_INTERNED) {
        *owned = 1;
        return u;
    }
    if ((self->used + 1) * 2 > self->cap && grow(self) < 0) {
        Py_DECREF(u);
        return NULL;
    }
    size_t j = h & (self->cap - 1);
    while (self->slots[j].str != NULL) j = (j + 1) & (self->cap - 1);
    self->slots[j].str = u;
    self->slots[j].hash = h;
    self->used++;
    return u;
}

/* ------------------------------------------------------------------ scanning */

static inline cursor skip_ws(cursor p, cursor e) {
    while (p < e && (*p == ' ' || *p == '\t' || *p == '\n' || *p == '\r')) p++;
    return p;
}

/* After an object member: 1 at a ',' (p moved past it and the whitespace after), 0 at the closing '}'
 * (p moved past it), -1 at anything else. */
static inline int after_member(cursor *pp, cursor e) {
    cursor p = skip_ws(*pp, e);
    if (p >= e) return -1;
    if (*p == ',') {
        *pp = skip_ws(p + 1, e);
        return 1;
    }
    if (*p != '}') return -1;
    *pp = p + 1;
    return 0;
}

/* A string of ASCII characters 0x20..0x7e without escapes; p at its opening quote. Returns the
 * position after the closing quote, or NULL (not handled here). */
static inline cursor scan_str(cursor p, cursor e, cursor *s, Py_ssize_t *n) {
    if (p >= e || *p != '"') return NULL;
    p++;
    cursor start = p;
    while (p < e) {
        unsigned char c = *p;
        if (c == '"') {
            *s = start;
            *n = p - start;
            return p + 1;
        }
        if (c < 0x20 || c > 0x7e || c == '\\') return NULL;
        p++;
    }
    return NULL;
}

static inline int is_digit(unsigned char c) { return c >= '0' && c <= '9'; }

/* A JSON number: sets *is_int and *iv for an integer literal of at most 18 digits, *dv for a
 * finite fraction or exponent form. Returns the position after it, or NULL (invalid, or not
 * handled here: long literals, integers past 18 digits, values that overflow a double). */
static cursor scan_num(cursor p, cursor e, int *is_int, long long *iv, double *dv) {
    cursor s = p;
    int neg = 0;
    if (p < e && *p == '-') {
        neg = 1;
        p++;
    }
    if (p >= e) return NULL;
    if (*p == '0') {
        p++;
    } else if (*p >= '1' && *p <= '9') {
        while (p < e && is_digit(*p)) p++;
    } else {
        return NULL;
    }
    cursor int_end = p;
    cursor frac_start = NULL, frac_end = NULL;
    int fraction = 0;
    long exp10 = 0;
    if (p < e && *p == '.') {
        p++;
        if (p >= e || !is_digit(*p)) return NULL;
        frac_start = p;
        while (p < e && is_digit(*p)) p++;
        frac_end = p;
        fraction = 1;
    }
    if (p < e && (*p == 'e' || *p == 'E')) {
        p++;
        int exp_neg = 0;
        if (p < e && (*p == '+' || *p == '-')) exp_neg = *p++ == '-';
        if (p >= e || !is_digit(*p)) return NULL;
        while (p < e && is_digit(*p)) {
            if (exp10 < 100000) exp10 = exp10 * 10 + (*p - '0');
            p++;
        }
        if (exp_neg) exp10 = -exp10;
        fraction = 1;
    }
    Py_ssize_t len = p - s;
    if (!fraction) {
        Py_ssize_t digits = int_end - s - neg;
        if (digits > 18) return NULL;
        long long v = 0;
        for (cursor q = s + neg; q < int_end; q++) v = v * 10 + (*q - '0');
        *iv = neg ? -v : v;
        *is_int = 1;
        return p;
    }
    /* Exact fast path (Clinger 1990): a decimal mantissa M below 2^53 and a power of ten of at most
     * 22 are both exact doubles, so one IEEE multiplication or division of them is the correctly
     * rounded value of the literal -- the value any correctly rounding parser gives. */
    {
        static const double pow10[23] = {1e0, 1e1, 1e2, 1e3, 1e4, 1e5, 1e6, 1e7, 1e8, 1e9, 1e10, 1e11,
                                         1e12, 1e13, 1e14, 1e15, 1e16, 1e17, 1e18, 1e19, 1e20, 1e21, 1e22};
        uint64_t mant = 0;
        int digits = 0;
        for (cursor q = s + neg; q < int_end; q++) {
            if (mant || *q != '0') digits++;
            mant = mant * 10 + (uint64_t)(*q - '0');
            if (digits > 17) goto slow;
        }
        if (frac_start != NULL) {
            for (cursor q = frac_start; q < frac_end; q++) {
                if (mant || *q != '0') digits++;
                mant = mant * 10 + (uint64_t)(*q - '0');
                if (digits > 17) goto slow;
            }
            exp10 -= (long)(frac_end - frac_start);
        }
        if (mant <= (1ULL << 53) && exp10 >= -22 && exp10 <= 22) {
            double d = (double)mant;
            d = exp10 >= 0 ? d * pow10[exp10] : d / pow10[-exp10];
            if (!isfinite(d)) return NULL;
            *dv = neg ? -d : d;
            *is_int = 0;
            return p;
        }
    }
slow:
    if (len > MAX_NUMBER_CHARS) return NULL;
    char buf[MAX_NUMBER_CHARS + 1];
    memcpy(buf, s, (size_t)len);
    buf[len] = '\0';
    char *endp = NULL;
    double d = PyOS_string_to_double(buf, &endp, NULL);
    if (d == -1.0 && PyErr_Occurred()) {
        PyErr_Clear();
        return NULL;
    }
    if (endp != buf + len || !isfinite(d)) return NULL;
    *dv = d;
    *is_int = 0;
    return p;
}

/* One label value: a string, number, true, false or null. */
static cursor skip_scalar(cursor p, cursor e) {
    if (p >= e) return NULL;
    unsigned char c = *p;
    if (c == '"') {
        cursor s;
        Py_ssize_t n;
        return scan_str(p, e, &s, &n);
    }
    if (c == 't') return (e - p >= 4 && memcmp(p, "true", 4) == 0) ? p + 4 : NULL;
    if (c == 'f') return (e - p >= 5 && memcmp(p, "false", 5) == 0) ? p + 5 : NULL;
    if (c == 'n') return (e - p >= 4 && memcmp(p, "null", 4) == 0) ? p + 4 : NULL;
    int is_int;
    long long iv;
    double dv;
    return scan_num(p, e, &is_int, &iv, &dv);
}

/* Days from 1970-01-01 to the proleptic Gregorian date y-m-d (H. Hinnant's days_from_civil). */
static long long days_from_civil(long long y, unsigned m, unsigned d) {
    y -= m <= 2;
    long long era = (y >= 0 ? y : y - 399) / 400;
    unsigned yoe = (unsigned)(y - era * 400);
    unsigned doy = (153 * (m + (m > 2 ? -3 : 9)) + 2) / 5 + d - 1;
    unsigned doe = yoe * 365 + yoe / 4 - yoe / 100 + doy;
    return era * 146097 + (long long)doe - 719468;
}

static int digits_at(cursor s, int n, int *out) {
    int v = 0;
    for (int i = 0; i < n; i++) {
        if (!is_digit(s[i])) return 0;
        v = v * 10 + (s[i] - '0');
    }
    *out = v;
    return 1;
}

/* The epoch seconds of ``YYYY-MM-DDTHH:MM:SS[.f]`` with 1 to 6 fraction digits and ``Z``, ``+HH:MM``,
 * ``-HH:MM`` or no zone (UTC), as ``datetime.fromisoformat(text).timestamp()`` gives them: whole
 * microseconds since the epoch over 10**6, one correctly rounded division (the integer is below 2**53).
 * 0 for any other text (the Python path, which takes more forms, reads it). */
static int parse_rfc3339(cursor s, Py_ssize_t n, double *out) {
    int y, mo, d, h, mi, sec, micro = 0;
    if (n < 19 || s[4] != '-' || s[7] != '-' || s[10] != 'T' || s[13] != ':' || s[16] != ':') return 0;
    if (!digits_at(s, 4, &y) || !digits_at(s + 5, 2, &mo) || !digits_at(s + 8, 2, &d) ||
        !digits_at(s + 11, 2, &h) || !digits_at(s + 14, 2, &mi) || !digits_at(s + 17, 2, &sec))
        return 0;
    static const int month_days[12] = {31, 28, 31, 30, 31, 30, 31, 31, 30, 31, 30, 31};
    int leap = (y % 4 == 0 && y % 100 != 0) || y % 400 == 0;
    if (y < 1 || mo < 1 || mo > 12 || d < 1 || d > month_days[mo - 1] + (mo == 2 && leap) || h > 23 || mi > 59 ||
        sec > 59)
        return 0;
    Py_ssize_t i = 19;
    if (i < n && s[i] == '.') {
        i++;
        int k = 0;
        while (i < n && is_digit(s[i]) && k < 7) {
            micro = micro * 10 + (s[i] - '0');
            i++;
            k++;
        }
        if (k < 1 || k > 6) return 0;
        for (; k < 6; k++) micro *= 10;
    }
    long long offset = 0;
    if (i == n) {
        /* no zone: UTC */
    } else if (s[i] == 'Z' && i + 1 == n) {
        /* UTC */
    } else if ((s[i] == '+' || s[i] == '-') && i + 6 == n && s[i + 3] == ':') {
        int oh, om;
        if (!digits_at(s + i + 1, 2, &oh) || !digits_at(s + i + 4, 2, &om) || oh > 23 || om > 59) return 0;
        offset = (s[i] == '+' ? 1 : -1) * (oh * 3600LL + om * 60LL);
    } else {
        return 0;
    }
    long long seconds = days_from_civil(y, (unsigned)mo, (unsigned)d) * 86400LL + h * 3600LL + mi * 60LL + sec - offset;
    *out = (double)(seconds * 1000000LL + micro) / 1e6;
    return 1;
}

typedef struct {
    cursor s;
    Py_ssize_t n;
} Span;

/* Whether any two of the spans hold the same bytes. */
static int has_duplicate(const Span *k, int n) {
    for (int i = 1; i < n; i++)
        for (int j = 0; j < i; j++)
            if (k[i].n == k[j].n && memcmp(k[i].s, k[j].s, (size_t)k[i].n) == 0) return 1;
    return 0;
}

typedef struct {
    cursor service;
    Py_ssize_t service_n;
    double ts;
    int n_metrics;
    Span names[MAX_FAST_METRICS];
    int is_int[MAX_FAST_METRICS];
    long long ivals[MAX_FAST_METRICS];
    double dvals[MAX_FAST_METRICS];
} Message;

typedef struct {
    Py_ssize_t max_bytes, max_service, max_metrics;
    double ceiling, min_ts, ms_threshold;
} Limits;


/* 1 when the line is a common-case message (filled into *m), 0 when the Python path must see it. */
static int scan_message(cursor p, cursor e, const Limits *lim, Message *m) {
    int seen_service = 0, seen_ts = 0, seen_metrics = 0, seen_labels = 0;
    p = skip_ws(p, e);
    if (p >= e || *p != '{') return 0;
    p = skip_ws(p + 1, e);
    if (p >= e || *p == '}') return 0;
    for (;;) {
        cursor k;
        Py_ssize_t kn;
        p = scan_str(p, e, &k, &kn);
        if (p == NULL) return 0;
        p = skip_ws(p, e);
        if (p >= e || *p != ':') return 0;
        p = skip_ws(p + 1, e);
        if (kn == 7 && memcmp(k, "service", 7) == 0) {
            if (seen_service++) return 0;
            p = scan_str(p, e, &m->service, &m->service_n);
            if (p == NULL || m->service_n == 0 || m->service_n > lim->max_service) return 0;
        } else if (kn == 2 && memcmp(k, "ts", 2) == 0) {
            if (seen_ts++) return 0;
            double ts;
            if (p < e && *p == '"') {
                cursor t;
                Py_ssize_t tn;
                p = scan_str(p, e, &t, &tn);
                if (p == NULL || !parse_rfc3339(t, tn, &ts)) return 0;
            } else {
                int is_int;
                long long iv;
                double dv;
                p = scan_num(p, e, &is_int, &iv, &dv);
                if (p == NULL) return 0;
                ts = is_int ? (double)iv : dv;
                if (ts > lim->ms_threshold) ts = ts / 1000.0;
            }
            if (ts < lim->min_ts || ts > lim->ceiling) return 0;
            m->ts = ts;
        } else if (kn == 7 && memcmp(k, "metrics", 7) == 0) {
            if (seen_metrics++) return 0;
            if (p >= e || *p != '{') return 0;
            p = skip_ws(p + 1, e);
            if (p >= e || *p == '}') return 0; /* empty: bad_metrics */
            int n = 0;
            for (;;) {
                if (n >= MAX_FAST_METRICS || n >= lim->max_metrics) return 0;
                p = scan_str(p, e, &m->names[n].s, &m->names[n].n);
                if (p == NULL) return 0;
                p = skip_ws(p, e);
                if (p >= e || *p != ':') return 0;
                p = skip_ws(p + 1, e);
                p = scan_num(p, e, &m->is_int[n], &m->ivals[n], &m->dvals[n]);
                if (p == NULL) return 0;
                n++;
                int more = after_member(&p, e);
                if (more < 0) return 0;
                if (!more) break;
            }
            if (has_duplicate(m->names, n)) return 0;
            m->n_metrics = n;
        } else if (kn == 6 && memcmp(k, "labels", 6) == 0) {
            if (seen_labels++) return 0;
            if (e - p >= 4 && memcmp(p, "null", 4) == 0) {
                p += 4;
            } else {
                if (p >= e || *p != '{') return 0;
                p = skip_ws(p + 1, e);
                if (p < e && *p == '}') {
                    p++;
                } else {
                    Span keys[MAX_FAST_METRICS];
                    int n = 0;
                    for (;;) {
                        if (n >= MAX_FAST_METRICS) return 0;
                        p = scan_str(p, e, &keys[n].s, &keys[n].n);
                        if (p == NULL) return 0;
                        n++;
                        p = skip_ws(p, e);
                        if (p >= e || *p != ':') return 0;
                        p = skip_ws(p + 1, e);
                        p = skip_scalar(p, e);
                        if (p == NULL) return 0;
                        int more = after_member(&p, e);
                        if (more < 0) return 0;
                        if (!more) break;
                    }
                    if (has_duplicate(keys, n)) return 0;
                }
            }
        } else {
            return 0; /* another field: the Python path takes it (and checks it for duplicates) */
        }
        int more = after_member(&p, e);
        if (more < 0) return 0;
        if (!more) {
            p = skip_ws(p, e);
            break;
        }
    }
    return p == e && seen_service && seen_ts && seen_metrics;
}

/* ------------------------------------------------------------------ the batch loop */

static int read_limits(PyObject *decoder, Limits *lim) {
    PyObject *v;
    if ((v = PyObject_GetAttr(decoder, s_max_message_bytes)) == NULL) return -1;
    lim->max_bytes = PyLong_AsSsize_t(v);
    Py_DECREF(v);
    if ((v = PyObject_GetAttr(decoder, s_max_service_name)) == NULL) return -1;
    lim->max_service = PyLong_AsSsize_t(v);
    Py_DECREF(v);
    if ((v = PyObject_GetAttr(decoder, s_max_metrics)) == NULL) return -1;
    lim->max_metrics = PyLong_AsSsize_t(v);
    Py_DECREF(v);
    if ((v = PyObject_GetAttr(decoder, s_ceiling)) == NULL) return -1;
    lim->ceiling = PyFloat_AsDouble(v);
    Py_DECREF(v);
    return PyErr_Occurred() ? -1 : 0;
}

static double attr_double(PyObject *o, PyObject *name, int *err) {
    PyObject *v = PyObject_GetAttr(o, name);
    if (v == NULL) {
        *err = 1;
        return 0.0;
    }
    double d = PyFloat_AsDouble(v);
    Py_DECREF(v);
    if (d == -1.0 && PyErr_Occurred()) *err = 1;
    return d;
}

/* The number object of metric j: an int for an integer literal, a float otherwise (as orjson gives). */
static inline PyObject *metric_value(const Message *m, int j) {
    return m->is_int[j] ? PyLong_FromLongLong(m->ivals[j]) : PyFloat_FromDouble(m->dvals[j]);
}

/* Opens the window of `service` that starts at `key`, as SourceWindows.add does for a message whose window
 * is new: the service's mapping of windows is created if it has none, the window (count 1, each metric's
 * first value, in message order) is stored under its start, and (close_at, service, start) is pushed on the
 * heap. The Window is made without running its __init__ (its four slots are set here), so no Python code
 * runs; heapq's C heappush compares tuples of floats and strings. */
static int open_window(Scanner *self, PyObject *open, PyObject *per_service, PyObject *service, PyObject *key,
                       double end, double close_at, PyObject *heap, const Message *m) {
    PyObject *values = PyDict_New(), *w = NULL, *o = NULL, *entry = NULL, *pushed = NULL;
    int rc = -1;
    if (values == NULL) return -1;
    for (int j = 0; j < m->n_metrics; j++) {
        int owned;
        PyObject *name = intern_ascii(self, m->names[j].s, m->names[j].n, &owned);
        if (name == NULL) goto out;
        PyObject *v = metric_value(m, j), *list = v ? PyList_New(1) : NULL;
        if (list == NULL) {
            Py_XDECREF(v);
            if (owned) Py_DECREF(name);
            goto out;
        }
        PyList_SET_ITEM(list, 0, v);
        int bad = PyDict_SetItem(values, name, list) < 0;
        Py_DECREF(list);
        if (owned) Py_DECREF(name);
        if (bad) goto out;
    }
    PyTypeObject *type = (PyTypeObject *)self->window_type;
    if ((w = type->tp_alloc(type, 0)) == NULL) goto out;
    if (PyObject_SetAttr(w, s_start, key) < 0 || (o = PyFloat_FromDouble(end)) == NULL ||
        PyObject_SetAttr(w, s_end, o) < 0)
        goto out;
    Py_CLEAR(o);
    if ((o = PyLong_FromLong(1)) == NULL || PyObject_SetAttr(w, s_count, o) < 0 ||
        PyObject_SetAttr(w, s_values, values) < 0)
        goto out;
    Py_CLEAR(o);
    if (per_service == NULL) {
        if ((o = PyDict_New()) == NULL || PyDict_SetItem(open, service, o) < 0) goto out;
        per_service = o; /* kept alive by `open` */
    }
    if (PyDict_SetItem(per_service, key, w) < 0) goto out;
    Py_CLEAR(o);
    if ((o = PyFloat_FromDouble(close_at)) == NULL || (entry = PyTuple_Pack(3, o, service, key)) == NULL) goto out;
    if ((pushed = PyObject_CallFunctionObjArgs(self->heappush, heap, entry, NULL)) == NULL) goto out;
    rc = 0;
out:
    Py_XDECREF(values);
    Py_XDECREF(w);
    Py_XDECREF(o);
    Py_XDECREF(entry);
    Py_XDECREF(pushed);
    return rc;
}

/* Scanner.feed(decoder, src, raws, start, owner, resolved) -> (next, accepted, due).
 *
 * Takes raws[start:] while each line is a common-case message and adds it to its window. Stops at
 * the first line it does not take (next < len(raws), due False: the caller handles raws[next] itself)
 * or just after a line that made a window due (due True: the caller closes windows, then goes on at
 * next). */
static PyObject *Scanner_feed(Scanner *self, PyObject *const *args, Py_ssize_t nargs) {
    if (nargs != 6) {
        PyErr_SetString(PyExc_TypeError, "feed(decoder, src, raws, start, owner, resolved)");
        return NULL;
    }
    PyObject *decoder = args[0], *src = args[1], *raws = args[2], *owner = args[4], *resolved = args[5];
    Py_ssize_t i = PyLong_AsSsize_t(args[3]);
    if (i == -1 && PyErr_Occurred()) return NULL;
    if (!PyList_CheckExact(raws) || !PyDict_CheckExact(owner) || !PyDict_CheckExact(resolved)) {
        PyErr_SetString(PyExc_TypeError, "raws must be a list, owner and resolved dicts");
        return NULL;
    }
    Limits lim;
    if (read_limits(decoder, &lim) < 0) return NULL;
    lim.min_ts = self->min_ts;
    lim.ms_threshold = self->ms_threshold;
    PyObject *open = NULL, *heap = NULL, *touched = NULL, *result = NULL;
    Message m;
    Py_ssize_t accepted = 0, n = PyList_GET_SIZE(raws);
    int due = 0, err = 0, mark_moved = 0;
    double high_mark = attr_double(src, s_high_mark, &err);
    if (err) return NULL;
    open = PyObject_GetAttr(src, s_open);
    heap = open ? PyObject_GetAttr(src, s_heap) : NULL;
    touched = heap ? PyObject_GetAttr(src, s_touched) : NULL;
    if (touched == NULL) goto done;
    if (!PyDict_CheckExact(open) || !PyList_CheckExact(heap) || !PySet_CheckExact(touched)) {
        PyErr_SetString(PyExc_TypeError, "src must be a SourceWindows");
        goto done;
    }
    for (; i < n; i++) {
        PyObject *raw = PyList_GET_ITEM(raws, i);
        if (!PyBytes_CheckExact(raw)) break;
        Py_ssize_t len = PyBytes_GET_SIZE(raw);
        if (len > lim.max_bytes) break;
        cursor p = (cursor)PyBytes_AS_STRING(raw);
        if (!scan_message(p, p + len, &lim, &m)) break;

        int owned;
        PyObject *service = intern_ascii(self, m.service, m.service_n, &owned);
        if (service == NULL) goto done;
        /* Everything below up to the first change only looks: any miss hands the line back. */
        PyObject *o = PyDict_GetItemWithError(owner, service);
        PyObject *settings = o == src ? PyDict_GetItemWithError(resolved, service) : NULL;
        PyObject *per_service = settings != NULL ? PyDict_GetItemWithError(open, service) : NULL;
        if (settings == NULL || (per_service == NULL && PyErr_Occurred()) ||
            (per_service != NULL && !PyDict_CheckExact(per_service))) {
            if (owned) Py_DECREF(service);
            if (PyErr_Occurred()) goto done;
            break;
        }
        double length = attr_double(settings, s_window, &err);
        double lateness = attr_double(settings, s_lateness, &err);
        if (err) {
            if (owned) Py_DECREF(service);
            goto done;
        }
        double ts = m.ts;
        /* Python's float %: fmod, with the sign of the divisor (length > 0, ts > 0: fmod itself). */
        double mod = fmod(ts, length);
        if (mod != 0.0 && ((length < 0) != (mod < 0))) mod += length;
        double start = ts - mod;
        double close_at = start + length + lateness;
        if (close_at <= high_mark) { /* late: the Python path refuses it */
            if (owned) Py_DECREF(service);
            break;
        }
        PyObject *key = PyFloat_FromDouble(start);
        if (key == NULL) {
            if (owned) Py_DECREF(service);
            goto done;
        }
        PyObject *window = per_service != NULL ? PyDict_GetItemWithError(per_service, key) : NULL;
        if (window == NULL) {
            /* A new window: opened here (the line is taken), or handed back where the scanner was made
             * without the Window class. */
            int rc = PyErr_Occurred() ? -1 : self->window_type == NULL ? 1
                   : open_window(self, open, per_service, service, key, start + length, close_at, heap, &m);
            Py_DECREF(key);
            if (rc == 0 && PySet_Add(touched, service) < 0) rc = -1;
            if (owned) Py_DECREF(service);
            if (rc < 0) goto done;
            if (rc > 0) break;
            goto taken;
        }
        Py_DECREF(key);
        PyObject *values = PyObject_GetAttr(window, s_values);
        if (values == NULL) {
            if (owned) Py_DECREF(service);
            goto done;
        }
        PyObject *lists[MAX_FAST_METRICS];
        int have_all = PyDict_CheckExact(values);
        for (int j = 0; have_all && j < m.n_metrics; j++) {
            int name_owned;
            PyObject *name = intern_ascii(self, m.names[j].s, m.names[j].n, &name_owned);
            if (name == NULL) {
                Py_DECREF(values);
                if (owned) Py_DECREF(service);
                goto done;
            }
            lists[j] = PyDict_GetItemWithError(values, name);
            if (name_owned) Py_DECREF(name);
            if (lists[j] == NULL || !PyList_CheckExact(lists[j])) have_all = 0;
        }
        if (!have_all) { /* a metric new to this window: the Python path adds it in arrival order */
            Py_DECREF(values);
            if (owned) Py_DECREF(service);
            if (PyErr_Occurred()) goto done;
            break;
        }
        PyObject *count = PyObject_GetAttr(window, s_count);
        long c = count == NULL ? -1 : PyLong_AsLong(count);
        Py_XDECREF(count);
        if (c == -1 && PyErr_Occurred()) {
            Py_DECREF(values);
            if (owned) Py_DECREF(service);
            goto done;
        }
        /* From here on the line is taken. */
        PyObject *new_count = PyLong_FromLong(c + 1);
        int failed = new_count == NULL || PyObject_SetAttr(window, s_count, new_count) < 0;
        Py_XDECREF(new_count);
        for (int j = 0; !failed && j < m.n_metrics; j++) {
            PyObject *v = metric_value(&m, j);
            failed = v == NULL || PyList_Append(lists[j], v) < 0;
            Py_XDECREF(v);
        }
        Py_DECREF(values);
        if (!failed) failed = PySet_Add(touched, service) < 0;
        if (owned) Py_DECREF(service);
        if (failed) goto done;
    taken:
        if (ts > high_mark) {
            high_mark = ts;
            mark_moved = 1;
        }
        accepted++;
        if (PyList_GET_SIZE(heap) > 0) {
            PyObject *first = PyList_GET_ITEM(heap, 0);
            if (PyTuple_CheckExact(first) && PyTuple_GET_SIZE(first) > 0) {
                double next_close = PyFloat_AsDouble(PyTuple_GET_ITEM(first, 0));
                if (next_close == -1.0 && PyErr_Occurred()) goto done;
                if (next_close <= high_mark) {
                    due = 1;
                    i++;
                    break;
                }
            }
        }
    }
    result = Py_BuildValue("(nnO)", i, accepted, due ? Py_True : Py_False);
done:
    if (mark_moved) {
        /* Written back even on an error: the lines counted so far are in their windows. */
        PyObject *type, *value, *tb;
        PyErr_Fetch(&type, &value, &tb);
        PyObject *hm = PyFloat_FromDouble(high_mark);
        if (hm == NULL || PyObject_SetAttr(src, s_high_mark, hm) < 0) Py_CLEAR(result);
        Py_XDECREF(hm);
        if (type != NULL) PyErr_Restore(type, value, tb);
    }
    Py_XDECREF(open);
    Py_XDECREF(heap);
    Py_XDECREF(touched);
    return result;
}

static PyObject *Scanner_interned(Scanner *self, PyObject *unused) { return PyLong_FromSize_t(self->used); }

static int Scanner_init(Scanner *self, PyObject *args, PyObject *kwds) {
    static char *kwlist[] = {"min_event_ts", "ms_threshold", "window_type", "heappush", NULL};
    PyObject *window_type = NULL, *heappush = NULL;
    if (!PyArg_ParseTupleAndKeywords(args, kwds, "$ddOO", kwlist, &self->min_ts, &self->ms_threshold, &window_type,
                                     &heappush))
        return -1;
    if (window_type == Py_None) window_type = NULL;
    if (window_type != NULL && (!PyType_Check(window_type) || heappush == NULL || !PyCallable_Check(heappush))) {
        PyErr_SetString(PyExc_TypeError, "window_type must be a class (or None) and heappush callable");
        return -1;
    }
    Py_XINCREF(window_type);
    Py_XINCREF(heappush);
    Py_XSETREF(self->window_type, window_type);
    Py_XSETREF(self->heappush, heappush);
    return 0;
}

static void Scanner_dealloc(Scanner *self) {
    Py_XDECREF(self->window_type);
    Py_XDECREF(self->heappush);
    for (size_t i = 0; i < self->cap; i++) Py_XDECREF(self->slots[i].str);
    PyMem_Free(self->slots);
    Py_TYPE(self)->tp_free((PyObject *)self);
}

static PyMethodDef Scanner_methods[] = {
    {"feed", (PyCFunction)(void (*)(void))Scanner_feed, METH_FASTCALL,
     "feed(decoder, src, raws, start, owner, resolved) -> (next, accepted, due)"},
    {"interned", (PyCFunction)Scanner_interned, METH_NOARGS, "How many names the scanner holds."},
    {NULL, NULL, 0, NULL},
};

static PyTypeObject ScannerType = {
    PyVarObject_HEAD_INIT(NULL, 0).tp_name = "service._hotpath.Scanner",
    .tp_basicsize = sizeof(Scanner),
    .tp_flags = Py_TPFLAGS_DEFAULT,
    .tp_doc = "Takes the common-case lines of a batch for Engine.feed (see service/_hotpath.c).",
    .tp_methods = Scanner_methods,
    .tp_init = (initproc)Scanner_init,
    .tp_new = PyType_GenericNew,
    .tp_dealloc = (destructor)Scanner_dealloc,
};

/* The scanner's reading of an RFC 3339 time, for the tests: a float, or None where it hands the line back. */
static PyObject *hotpath_rfc3339(PyObject *module, PyObject *arg) {
    if (!PyBytes_Check(arg)) {
        PyErr_SetString(PyExc_TypeError, "rfc3339(text: bytes)");
        return NULL;
    }
    double ts;
    if (!parse_rfc3339((cursor)PyBytes_AS_STRING(arg), PyBytes_GET_SIZE(arg), &ts)) Py_RETURN_NONE;
    return PyFloat_FromDouble(ts);
}

static PyMethodDef hotpath_functions[] = {
    {"rfc3339", hotpath_rfc3339, METH_O, "rfc3339(text) -> epoch seconds, or None where the scanner hands the line back."},
    {NULL, NULL, 0, NULL},
};

static struct PyModuleDef hotpath_module = {
    PyModuleDef_HEAD_INIT, "service._hotpath", "The C hot path of Engine.feed.", -1, hotpath_functions,
};

PyMODINIT_FUNC PyInit__hotpath(void) {
    if (PyType_Ready(&ScannerType) < 0) return NULL;
#define NAME(var, text) \
    if ((var = PyUnicode_InternFromString(text)) == NULL) return NULL;
    NAME(s_open, "open")
    NAME(s_heap, "_heap")
    NAME(s_touched, "touched")
    NAME(s_high_mark, "high_mark")
    NAME(s_values, "values")
    NAME(s_count, "count")
    NAME(s_start, "start")
    NAME(s_end, "end")
    NAME(s_window, "window")
    NAME(s_lateness, "lateness")
    NAME(s_max_message_bytes, "max_message_bytes")
    NAME(s_max_service_name, "max_service_name")
    NAME(s_max_metrics, "max_metrics")
    NAME(s_ceiling, "_ceiling")
#undef NAME
    PyObject *m = PyModule_Create(&hotpath_module);
    if (m == NULL) return NULL;
    Py_INCREF(&ScannerType);
    if (PyModule_AddObject(m, "Scanner", (PyObject *)&ScannerType) < 0) {
        Py_DECREF(&ScannerType);
        Py_DECREF(m);
        return NULL;
    }
    return m;
}
