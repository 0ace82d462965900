/* jointfmu's native FMI 2.0 co-simulation binary ("shell").
 *
 * Every FMI call is forwarded to the Python slave of the FMU (a jointfmu.slave.JointSlave
 * subclass named in resources/slavemodule.txt), except fmi2SetReal of inputs and fmi2GetReal of
 * outputs once the simulator exists: those read and write the simulator's input and output
 * buffers (array.array objects) directly, without the Python interpreter.  The slave tells the
 * shell where the buffers are and which value reference sits where (JointSlave._native_layout);
 * the shell hands the inputs it wrote back to the slave (JointSlave._native_take) before any
 * other call into Python, so the Python side always knows them.
 *
 * The binary links no libpython: the Python C API comes from the host process (a Python host
 * such as fmpy, or a C host that loaded libpython with RTLD_GLOBAL).  If the interpreter is not
 * initialized yet, fmi2Instantiate initializes it (and never finalizes it).
 *
 * The fast path touches only the two exported buffers and takes no GIL: a host does not call
 * the functions of one instance concurrently (the FMI 2.0.x standard, sec. 2.1, does not ask
 * them to be thread-safe), and Python reads those buffers only inside calls the shell makes,
 * after it has handed its writes over.
 *
 * fmi2DoStep, too, runs without Python when the simulator uses the compiled kernel: the slave
 * hands over the address of the kernel's C entry (a Numba cfunc of kernel.step_planned) and
 * pointers to the simulator's arrays (JointSlave._native_step_entry), and allows compiled steps
 * after each doStep it ran itself (bit 3 of _native_do_step).  The entry checks the inputs,
 * steps with a plan made before for that step size, advances the time and undoes a step that
 * failed; whenever it does not step (no plan yet for this step size, an input refused, a failed
 * step), doStep goes through Python as before, which plans, or refuses with its message, from
 * the unchanged state.  Any other call into Python except reads withdraws the permission until
 * the next doStep through Python (see compiled_do_step).
 *
 * Types, function names and calling rules: FMI 2.0.x standard, sec. 2.1 (common API) and
 * sec. 4.2 (co-simulation API).  The few types needed are declared here.
 *
 * FMI's rules.  The shell keeps the instance's place in the co-simulation state machine (FMI
 * 2.0 sec. 4.2.4; see "The state machine" below) and answers a call that is not allowed there
 * with fmi2Error and a message, changing nothing, before any Python runs.  The slave checks the
 * same table again (jointfmu.fmu.slave.ALLOWED_STATES, for pythonfmu's binary, which has no
 * state machine of its own) and refuses what only it can judge (an unknown value reference, a
 * parameter set after initialization, an FMU state of another build, parameters out of range)
 * by raising its CALL_ERROR: the shell answers that with fmi2Error as well.  Any other Python
 * exception is a bug: it is printed, logged, answered with fmi2Error and leaves the instance
 * in the error state.
 */
#define PY_SSIZE_T_CLEAN
#include <Python.h>

#include <math.h>
#include <stdarg.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

/* ---------------------------------------------------------------- FMI 2.0 types (sec. 2.1.2) */
typedef void *fmi2Component;
typedef void *fmi2ComponentEnvironment;
typedef void *fmi2FMUstate;
typedef unsigned int fmi2ValueReference;
typedef double fmi2Real;
typedef int fmi2Integer;
typedef int fmi2Boolean;
typedef char fmi2Char;
typedef const fmi2Char *fmi2String;
typedef char fmi2Byte;

typedef enum { fmi2OK, fmi2Warning, fmi2Discard, fmi2Error, fmi2Fatal, fmi2Pending } fmi2Status;
typedef enum { fmi2ModelExchange, fmi2CoSimulation } fmi2Type;
typedef enum { fmi2DoStepStatus, fmi2PendingStatus, fmi2LastSuccessfulTime, fmi2Terminated }
    fmi2StatusKind;

typedef void (*fmi2CallbackLogger)(fmi2ComponentEnvironment, fmi2String, fmi2Status, fmi2String,
                                   fmi2String, ...);
typedef struct {
    fmi2CallbackLogger logger;
    void *(*allocateMemory)(size_t, size_t);
    void (*freeMemory)(void *);
    void (*stepFinished)(fmi2ComponentEnvironment, fmi2Status);
    fmi2ComponentEnvironment componentEnvironment;
} fmi2CallbackFunctions;

#if defined(_WIN32)
#define FMI2_EXPORT __declspec(dllexport)
#else
#define FMI2_EXPORT __attribute__((visibility("default")))
#endif

static PyObject *new_ref(PyObject *o)
{
    Py_INCREF(o);
    return o;
}

static PyObject *new_none(void) { return new_ref(Py_None); }

/* ------------------------------------------------------------------------------ the instance */
#define STATE_MAGIC 0x4a465354u /* "JFST" */
#define INSTANCE_MAGIC 0x4a46494eu /* "JFIN" */

typedef struct {
    uint32_t magic;
    PyObject *obj; /* what the slave's _get_fmu_state returned (a new reference) */
} ShellState;

/* ------------------------------------------------------------------------- the state machine
 * FMI 2.0 sec. 4.2.4 ("State Machine of Calling Sequence from Master to Slave"), with sec. 2.1.3
 * for the error state.  The numbers are those of jointfmu.fmu.slave (INSTANTIATED ... ERROR).
 *
 *   instantiated --fmi2EnterInitializationMode--> initialization mode
 *   initialization mode --fmi2ExitInitializationMode--> step complete   (fmi2Error: error)
 *   step complete --fmi2DoStep--> step complete (fmi2OK) | step failed (fmi2Discard)
 *   step complete, step failed --fmi2Terminate--> terminated
 *   any state --fmi2Reset--> instantiated;  any --fmi2SetFMUstate--> the state saved with it
 *
 * "step failed": a doStep could not be taken (the state from before it kept); the host may
 * read, ask the status, restore an FMU state, terminate or reset.  doStep never runs
 * asynchronously, so the states "step in progress" and "step canceled" do not occur. */
enum { ST_INSTANTIATED, ST_INITIALIZATION, ST_STEP_COMPLETE, ST_STEP_FAILED, ST_TERMINATED,
       ST_ERROR, N_STATES };
#define IN(st) (1u << (st))
#define ANY_STATE (IN(N_STATES) - 1u)
#define READABLE (IN(ST_INITIALIZATION) | IN(ST_STEP_COMPLETE) | IN(ST_STEP_FAILED) | \
                  IN(ST_TERMINATED) | IN(ST_ERROR))
#define SETTABLE (IN(ST_INSTANTIATED) | IN(ST_INITIALIZATION) | IN(ST_STEP_COMPLETE))
#define STATUS_QUERY (IN(ST_STEP_COMPLETE) | IN(ST_STEP_FAILED) | IN(ST_TERMINATED))

static const char *const STATE_NAMES[N_STATES] = {
    "instantiated", "initialization mode", "step complete", "step failed", "terminated", "error"};

/* The states each call is allowed in: the table of sec. 4.2.4 for co-simulation.  One row per
 * call; it defines MASK_<call> for the checks and the table jointfmu_allowed_states reads. */
#define ALLOWED_STATES(X)                                                                    \
    X(fmi2SetDebugLogging, ANY_STATE)                                                        \
    X(fmi2SetupExperiment, IN(ST_INSTANTIATED))                                              \
    X(fmi2EnterInitializationMode, IN(ST_INSTANTIATED))                                      \
    X(fmi2ExitInitializationMode, IN(ST_INITIALIZATION))                                     \
    X(fmi2Terminate, IN(ST_STEP_COMPLETE) | IN(ST_STEP_FAILED))                              \
    X(fmi2Reset, ANY_STATE)                                                                  \
    X(fmi2GetReal, READABLE)                                                                 \
    X(fmi2GetInteger, READABLE)                                                              \
    X(fmi2GetBoolean, READABLE)                                                              \
    X(fmi2GetString, READABLE)                                                               \
    X(fmi2SetReal, SETTABLE)                                                                 \
    X(fmi2SetInteger, SETTABLE)                                                              \
    X(fmi2SetBoolean, SETTABLE)                                                              \
    X(fmi2SetString, SETTABLE)                                                               \
    X(fmi2GetFMUstate, ANY_STATE)                                                            \
    X(fmi2SetFMUstate, ANY_STATE)                                                            \
    X(fmi2FreeFMUstate, ANY_STATE)                                                           \
    X(fmi2SerializedFMUstateSize, ANY_STATE)                                                 \
    X(fmi2SerializeFMUstate, ANY_STATE)                                                      \
    X(fmi2DeSerializeFMUstate, ANY_STATE)                                                    \
    X(fmi2GetDirectionalDerivative, READABLE)                                                \
    X(fmi2SetRealInputDerivatives, SETTABLE)                                                 \
    X(fmi2GetRealOutputDerivatives, READABLE & ~IN(ST_INITIALIZATION))                       \
    X(fmi2DoStep, IN(ST_STEP_COMPLETE))                                                      \
    X(fmi2CancelStep, 0u) /* only while a step is in progress: never here */                 \
    X(fmi2GetStatus, STATUS_QUERY)                                                           \
    X(fmi2GetRealStatus, STATUS_QUERY)                                                       \
    X(fmi2GetIntegerStatus, STATUS_QUERY)                                                    \
    X(fmi2GetBooleanStatus, STATUS_QUERY)                                                    \
    X(fmi2GetStringStatus, STATUS_QUERY)

#define DEFINE_MASK(call, states) enum { MASK_##call = (int)(states) };
ALLOWED_STATES(DEFINE_MASK)

static const struct {
    const char *call;
    unsigned states;
} ALLOWED[] = {
#define TABLE_ROW(call, states) {#call, (unsigned)(states)},
    ALLOWED_STATES(TABLE_ROW)
};

/* The table, for tests (not an FMI function): the states a call is allowed in as bits
 * 1 << state, or -1 for a call it does not hold. */
FMI2_EXPORT int jointfmu_allowed_states(const char *call)
{
    for (size_t k = 0; k < sizeof ALLOWED / sizeof ALLOWED[0]; k++)
        if (call && strcmp(ALLOWED[k].call, call) == 0) return (int)ALLOWED[k].states;
    return -1;
}

typedef struct {
    uint32_t magic;
    char *instance_name;
    char *resources;      /* the resources folder as a file-system path */
    fmi2CallbackFunctions cb;
    int logging_on;
    char **categories;    /* NULL or n_categories names: the categories logged */
    size_t n_categories;
    int visible;
    int broken;           /* fmi2Fatal was returned: only fmi2FreeInstance is allowed */
    int state;            /* ST_INSTANTIATED ... ST_ERROR (the state machine above) */
    double last_time;     /* fmi2LastSuccessfulTime: end of the last step taken, NaN before */
    int step_refused;     /* the last doStep returned fmi2Discard (fmi2Terminated) */

    PyObject *cls;        /* the slave class */
    PyObject *call_error; /* cls.CALL_ERROR: the exception of a call the slave refuses */
    PyObject *slave;      /* the slave instance */
    PyObject *log_queue;  /* slave._get_log_queue(): a list of LogMsg */

    /* the fast path (valid when has_layout) */
    int has_layout;
    PyObject *ubuf_obj, *ybuf_obj;   /* the simulator's array.array buffers (references) */
    Py_buffer ubuf, ybuf;            /* exported: the arrays cannot be resized while held */
    double *u, *y;
    Py_ssize_t nu, ny;
    Py_ssize_t n_vars;
    Py_ssize_t *in_pos;   /* per value reference: input position, -1 if not an input */
    Py_ssize_t *out_pos;  /* per value reference: output position, -1 if not an output */
    Py_ssize_t base_pos;
    int has_base;
    double max_input;
    int py_pending;       /* the slave may hold inputs not handed to its simulator yet */
    int out_fresh;        /* the output buffer agrees with the state and the inputs */
    /* inputs written by the shell and not yet handed to the slave (value references) */
    fmi2ValueReference *dirty;
    unsigned char *dirty_mark;
    size_t n_dirty;

    /* the compiled step (see the top): valid when c_step is not NULL */
    int64_t (*c_step)(void **pointers, const int64_t *dims, double dt);
    void **c_pointers;
    int64_t *c_dims;
    PyObject *c_owner;   /* the simulator, whose arrays the pointers point into (a reference) */
    int c_step_ok;       /* the slave allows compiled steps (until the next call into Python) */
} Shell;

/* ----------------------------------------------------------------------------------- logging */
static int category_on(const Shell *s, const char *category)
{
    if (!s->logging_on) return 0;
    if (s->n_categories == 0) return 1; /* sec. 2.1.5: nCategories = 0 logs every category */
    for (size_t k = 0; k < s->n_categories; k++)
        if (strcmp(s->categories[k], "logAll") == 0 ||
            (category && strcmp(s->categories[k], category) == 0))
            return 1;
    return 0;
}

/* The logger's message is a printf format (sec. 2.1.5): a literal '%' is written as "%%". */
static void emit(const fmi2CallbackFunctions *cb, const char *name, fmi2Status status,
                 const char *category, const char *msg)
{
    if (!cb || !cb->logger) return;
    if (!strchr(msg, '%')) {
        cb->logger(cb->componentEnvironment, name, status, category, msg);
        return;
    }
    size_t n = strlen(msg), extra = 0;
    for (size_t k = 0; k < n; k++) extra += msg[k] == '%';
    char *esc = malloc(n + extra + 1);
    if (!esc) return;
    char *w = esc;
    for (size_t k = 0; k < n; k++) {
        *w++ = msg[k];
        if (msg[k] == '%') *w++ = '%';
    }
    *w = '\0';
    cb->logger(cb->componentEnvironment, name, status, category, esc);
    free(esc);
}

static void send_log(Shell *s, fmi2Status status, const char *category, const char *msg)
{
    if (category_on(s, category)) emit(&s->cb, s->instance_name, status, category, msg);
}

static const char *status_category(fmi2Status status)
{
    switch (status) {
    case fmi2Warning: return "logStatusWarning";
    case fmi2Discard: return "logStatusDiscard";
    case fmi2Error: return "logStatusError";
    case fmi2Fatal: return "logStatusFatal";
    default: return "logAll";
    }
}

static void shell_log(Shell *s, fmi2Status status, const char *fmt, ...)
{
    char buf[1024];
    va_list args;
    va_start(args, fmt);
    vsnprintf(buf, sizeof buf, fmt, args);
    va_end(args);
    send_log(s, status, status_category(status), buf);
}

/* Before an instance exists (a failed fmi2Instantiate) the host's logger is all there is. */
static void early_log(const fmi2CallbackFunctions *cb, fmi2String name, const char *msg)
{
    emit(cb, name ? name : "", fmi2Error, "logStatusError", msg);
}

/* Forward and empty the slave's log queue (GIL held).  Messages reach the host only while
 * logging is on, as with pythonfmu's own binary. */
static void drain_log(Shell *s)
{
    PyObject *q = s->log_queue;
    if (!q || !PyList_Check(q)) return;
    Py_ssize_t n = PyList_GET_SIZE(q);
    if (n == 0) return;
    for (Py_ssize_t k = 0; k < n; k++) {
        PyObject *m = PyList_GET_ITEM(q, k);
        PyObject *st = PyObject_GetAttrString(m, "status");
        PyObject *cat = PyObject_GetAttrString(m, "category");
        PyObject *txt = PyObject_GetAttrString(m, "msg");
        long status = st ? PyLong_AsLong(st) : (long)fmi2OK;
        if (status < 0 || status > fmi2Pending) status = fmi2OK;
        PyErr_Clear();
        const char *cs = (cat && PyUnicode_Check(cat)) ? PyUnicode_AsUTF8(cat) : NULL;
        PyErr_Clear();
        PyObject *txt_str = txt ? PyObject_Str(txt) : NULL;
        const char *ms = txt_str ? PyUnicode_AsUTF8(txt_str) : NULL;
        PyErr_Clear();
        send_log(s, (fmi2Status)status, cs ? cs : status_category((fmi2Status)status),
                 ms ? ms : "(unreadable log message)");
        Py_XDECREF(st);
        Py_XDECREF(cat);
        Py_XDECREF(txt);
        Py_XDECREF(txt_str);
    }
    PyList_SetSlice(q, 0, n, NULL);
    PyErr_Clear();
}

static void set_slave_state(Shell *s, int state);

/* A Python exception is pending (GIL held).  The slave's CALL_ERROR is a refused call: its
 * message is in the log queue (forwarded now), nothing was changed, returns 1.  Anything else is
 * a bug: printed, logged, cleared, the instance put in the error state, returns 0. */
static int report_exception(Shell *s, const char *where)
{
    if (s && s->call_error && PyErr_ExceptionMatches(s->call_error)) {
        PyErr_Clear();
        drain_log(s);
        return 1;
    }
    PyObject *type, *value, *tb;
    PyErr_Fetch(&type, &value, &tb);
    PyErr_NormalizeException(&type, &value, &tb);
    const char *tname = "exception";
    PyObject *tname_obj = type ? PyObject_GetAttrString(type, "__name__") : NULL;
    if (tname_obj && PyUnicode_Check(tname_obj)) tname = PyUnicode_AsUTF8(tname_obj);
    PyObject *vstr = value ? PyObject_Str(value) : NULL;
    const char *vtext = vstr ? PyUnicode_AsUTF8(vstr) : NULL;
    char buf[1024];
    snprintf(buf, sizeof buf, "%s: Python raised %s: %s", where, tname ? tname : "exception",
             vtext ? vtext : "");
    Py_XDECREF(tname_obj);
    Py_XDECREF(vstr);
    PyErr_Clear();
    PyErr_Restore(type, value, tb);
    PyErr_Print(); /* to sys.stderr */
    PyErr_Clear();
    if (s) {
        drain_log(s);
        send_log(s, fmi2Error, "logStatusError", buf);
        set_slave_state(s, ST_ERROR);
    }
    return 0;
}

/* ------------------------------------------------------------------------------ fast layout */
/* ----------------------------------------------------------------------------- compiled step */
/* The codes of kernel.step_planned: only STEP_DONE means a step was taken. */
#define STEP_DONE 1

static void drop_step_entry(Shell *s)
{
    s->c_step = NULL;
    s->c_step_ok = 0;
    free(s->c_pointers);
    free(s->c_dims);
    s->c_pointers = NULL;
    s->c_dims = NULL;
    Py_CLEAR(s->c_owner);
}

static int take_integers(PyObject *seq, Py_ssize_t n, int64_t *dest)
{
    for (Py_ssize_t k = 0; k < n; k++) {
        long long v = PyLong_AsLongLong(PyTuple_GET_ITEM(seq, k));
        if (v == -1 && PyErr_Occurred()) return -1;
        dest[k] = (int64_t)v;
    }
    return 0;
}

/* A Python exception is pending (GIL held) from asking for the compiled step: no reason to
 * stop, doStep goes through Python; printed, and logged as a warning. */
static void step_entry_unavailable(Shell *s)
{
    PyErr_Print(); /* to sys.stderr, cleared */
    send_log(s, fmi2Warning, "logStatusWarning", "fmi2 shell: the compiled doStep is not "
             "available (the error is on stderr); doStep goes through Python");
}

/* Ask the slave for its simulator's compiled step (GIL held, layout fetched).  None, or any
 * problem, leaves it off: doStep then goes through Python, as with the plain-Python kernel. */
static void fetch_step_entry(Shell *s)
{
    drop_step_entry(s);
    PyObject *r = PyObject_CallMethod(s->slave, "_native_step_entry", NULL);
    if (!r) {
        step_entry_unavailable(s);
        return;
    }
    drain_log(s);
    if (r == Py_None) {
        Py_DECREF(r);
        return;
    }
    PyObject *addr, *ptrs, *dims, *owner;
    if (!PyArg_ParseTuple(r, "OO!O!O", &addr, &PyTuple_Type, &ptrs, &PyTuple_Type, &dims,
                          &owner))
        goto fail;
    Py_ssize_t np_ = PyTuple_GET_SIZE(ptrs), nd = PyTuple_GET_SIZE(dims);
    void *fn = PyLong_AsVoidPtr(addr);
    if (!fn && PyErr_Occurred()) goto fail;
    s->c_pointers = malloc(sizeof(void *) * (size_t)(np_ ? np_ : 1));
    s->c_dims = malloc(sizeof(int64_t) * (size_t)(nd ? nd : 1));
    if (!s->c_pointers || !s->c_dims) {
        PyErr_NoMemory();
        goto fail;
    }
    for (Py_ssize_t k = 0; k < np_; k++) {
        s->c_pointers[k] = PyLong_AsVoidPtr(PyTuple_GET_ITEM(ptrs, k));
        if (!s->c_pointers[k] && PyErr_Occurred()) goto fail;
    }
    if (take_integers(dims, nd, s->c_dims) != 0) goto fail;
    if (!fn) {
        PyErr_SetString(PyExc_ValueError, "_native_step_entry: no address");
        goto fail;
    }
    s->c_owner = new_ref(owner);
    s->c_step = (int64_t(*)(void **, const int64_t *, double))fn;
    Py_DECREF(r);
    return;
fail:
    Py_DECREF(r);
    step_entry_unavailable(s);
    drop_step_entry(s);
}

/* fmi2DoStep without Python: 1 if the compiled entry took the step (outputs current), 0 if
 * doStep must go through Python (not allowed now, inputs held back in the slave, or the entry
 * did not step: it then changed nothing, or undid its failed step). */
static int compiled_do_step(Shell *s, double dt)
{
    if (!s->c_step || !s->c_step_ok || s->py_pending || !s->has_layout) return 0;
    if (s->c_step(s->c_pointers, s->c_dims, dt) != STEP_DONE) return 0;
    s->out_fresh = 1;
    return 1;
}

static void drop_layout(Shell *s)
{
    drop_step_entry(s);
    if (s->ubuf_obj) {
        PyBuffer_Release(&s->ubuf);
        Py_CLEAR(s->ubuf_obj);
    }
    if (s->ybuf_obj) {
        PyBuffer_Release(&s->ybuf);
        Py_CLEAR(s->ybuf_obj);
    }
    free(s->in_pos);
    free(s->out_pos);
    free(s->dirty);
    free(s->dirty_mark);
    s->in_pos = s->out_pos = NULL;
    s->dirty = NULL;
    s->dirty_mark = NULL;
    s->n_dirty = 0;
    s->u = s->y = NULL;
    s->nu = s->ny = 0;
    s->n_vars = 0;
    s->has_layout = 0;
    s->out_fresh = 0;
    s->py_pending = 1;
}

static int take_positions(PyObject *seq, Py_ssize_t n, Py_ssize_t limit, Py_ssize_t *dest)
{
    if (!PyTuple_Check(seq) || PyTuple_GET_SIZE(seq) != n) return -1;
    for (Py_ssize_t k = 0; k < n; k++) {
        Py_ssize_t p = PyLong_AsSsize_t(PyTuple_GET_ITEM(seq, k));
        if (p == -1 && PyErr_Occurred()) return -1;
        if (p < -1 || p >= limit) return -1;
        dest[k] = p;
    }
    return 0;
}

static int export_doubles(PyObject *obj, Py_buffer *view, double **data, Py_ssize_t *n)
{
    if (PyObject_GetBuffer(obj, view, PyBUF_WRITABLE | PyBUF_FORMAT | PyBUF_C_CONTIGUOUS) != 0)
        return -1;
    if (view->itemsize != (Py_ssize_t)sizeof(double) || !view->format ||
        strcmp(view->format, "d") != 0) {
        PyBuffer_Release(view);
        PyErr_SetString(PyExc_TypeError, "simulator buffer is not an array of doubles");
        return -1;
    }
    *data = (double *)view->buf;
    *n = view->len / (Py_ssize_t)sizeof(double);
    return 0;
}

/* Ask the slave where its simulator's buffers are (GIL held).  Without a simulator, or on any
 * problem, the fast path stays off and every call goes through Python. */
static void fetch_layout(Shell *s)
{
    drop_layout(s);
    PyObject *r = PyObject_CallMethod(s->slave, "_native_layout", NULL);
    if (!r) {
        report_exception(s, "fmi2 shell: _native_layout");
        return;
    }
    drain_log(s);
    if (r == Py_None) {
        Py_DECREF(r);
        return;
    }
    PyObject *ub, *yb, *inp, *outp;
    Py_ssize_t base_pos;
    int has_base, pending;
    double max_input;
    if (!PyArg_ParseTuple(r, "OOO!O!npdp", &ub, &yb, &PyTuple_Type, &inp, &PyTuple_Type, &outp,
                          &base_pos, &has_base, &max_input, &pending))
        goto fail;
    Py_ssize_t n = PyTuple_GET_SIZE(inp);
    if (export_doubles(ub, &s->ubuf, &s->u, &s->nu) != 0) goto fail;
    s->ubuf_obj = new_ref(ub);
    if (export_doubles(yb, &s->ybuf, &s->y, &s->ny) != 0) goto fail;
    s->ybuf_obj = new_ref(yb);
    s->in_pos = malloc(sizeof(Py_ssize_t) * (size_t)(n ? n : 1));
    s->out_pos = malloc(sizeof(Py_ssize_t) * (size_t)(n ? n : 1));
    s->dirty = malloc(sizeof(fmi2ValueReference) * (size_t)(n ? n : 1));
    s->dirty_mark = calloc((size_t)(n ? n : 1), 1);
    if (!s->in_pos || !s->out_pos || !s->dirty || !s->dirty_mark) {
        PyErr_NoMemory();
        goto fail;
    }
    if (take_positions(inp, n, s->nu, s->in_pos) != 0 ||
        take_positions(outp, n, s->ny, s->out_pos) != 0) {
        if (!PyErr_Occurred())
            PyErr_SetString(PyExc_ValueError, "_native_layout: bad position tables");
        goto fail;
    }
    if (!(max_input >= 0.0) || base_pos < 0 || base_pos >= s->nu) {
        PyErr_SetString(PyExc_ValueError, "_native_layout: bad base position or input bound");
        goto fail;
    }
    s->n_vars = n;
    s->base_pos = base_pos;
    s->has_base = has_base;
    s->max_input = max_input;
    s->py_pending = pending;
    s->out_fresh = 0;
    s->has_layout = 1;
    Py_DECREF(r);
    fetch_step_entry(s);
    return;
fail:
    Py_DECREF(r);
    report_exception(s, "fmi2 shell: _native_layout (fast get/set off)");
    drop_layout(s);
}

/* Hand the inputs written by the shell to the slave (GIL held). */
static int flush_inputs(Shell *s)
{
    if (!s->n_dirty) return 0;
    PyObject *t = PyTuple_New((Py_ssize_t)s->n_dirty);
    if (!t) goto fail;
    for (size_t k = 0; k < s->n_dirty; k++) {
        PyObject *v = PyLong_FromUnsignedLong(s->dirty[k]);
        if (!v) {
            Py_DECREF(t);
            goto fail;
        }
        PyTuple_SET_ITEM(t, (Py_ssize_t)k, v);
        s->dirty_mark[s->dirty[k]] = 0;
    }
    s->n_dirty = 0;
    PyObject *r = PyObject_CallMethod(s->slave, "_native_take", "(O)", t);
    Py_DECREF(t);
    if (!r) goto fail;
    Py_DECREF(r);
    drain_log(s);
    return 0;
fail:
    report_exception(s, "fmi2 shell: handing inputs to the slave");
    return -1;
}

/* A tuple of the pending input value references, emptying the list (GIL held). */
static PyObject *take_dirty(Shell *s)
{
    PyObject *t = PyTuple_New((Py_ssize_t)s->n_dirty);
    if (!t) return NULL;
    for (size_t k = 0; k < s->n_dirty; k++) {
        PyObject *v = PyLong_FromUnsignedLong(s->dirty[k]);
        if (!v) {
            Py_DECREF(t);
            return NULL;
        }
        PyTuple_SET_ITEM(t, (Py_ssize_t)k, v);
        s->dirty_mark[s->dirty[k]] = 0;
    }
    s->n_dirty = 0;
    return t;
}

/* --------------------------------------------------------------------------- Python set-up */
static int ensure_python(void)
{
    if (Py_IsInitialized()) return 0;
    /* A host that is not Python and did not start the interpreter: start it here, keep it for
     * the life of the process, and release the GIL so that every call can take it. */
    Py_InitializeEx(0);
    if (!Py_IsInitialized()) return -1;
    PyEval_SaveThread();
    return 0;
}

static char *dup_str(const char *s)
{
    if (!s) return NULL;
    size_t n = strlen(s) + 1;
    char *d = malloc(n);
    if (d) memcpy(d, s, n);
    return d;
}

static int hexval(char c)
{
    if (c >= '0' && c <= '9') return c - '0';
    if (c >= 'a' && c <= 'f') return c - 'a' + 10;
    if (c >= 'A' && c <= 'F') return c - 'A' + 10;
    return -1;
}

/* fmuResourceLocation is a URI (sec. 2.1.6, e.g. "file:///tmp/x/resources"); a plain path is
 * taken as it is.  Percent escapes are decoded; a trailing '/' is dropped. */
static char *resource_path(const char *uri)
{
    if (!uri) return NULL;
    const char *p = uri;
    if (strncmp(p, "file://localhost/", 17) == 0) p += 16;
    else if (strncmp(p, "file:///", 8) == 0) p += 7;
    else if (strncmp(p, "file:/", 6) == 0) p += 5;
    char *out = malloc(strlen(p) + 1);
    if (!out) return NULL;
    char *w = out;
    while (*p) {
        int h1, h2;
        if (p[0] == '%' && (h1 = hexval(p[1])) >= 0 && (h2 = hexval(p[2])) >= 0) {
            *w++ = (char)(h1 * 16 + h2);
            p += 3;
        } else {
            *w++ = *p++;
        }
    }
    *w = '\0';
    size_t n = strlen(out);
    while (n > 1 && out[n - 1] == '/') out[--n] = '\0';
    return out;
}

/* Create the slave instance with the keyword arguments pythonfmu passes (GIL held). */
static int new_slave(Shell *s)
{
    Py_CLEAR(s->log_queue);
    Py_CLEAR(s->slave);
    drop_layout(s);
    PyObject *kwargs = Py_BuildValue("{s:s,s:s,s:n,s:O}", "instance_name", s->instance_name,
                                     "resources", s->resources, "logger", (Py_ssize_t)(intptr_t)s,
                                     "visible", s->visible ? Py_True : Py_False);
    if (!kwargs) return -1;
    PyObject *args = PyTuple_New(0);
    if (!args) {
        Py_DECREF(kwargs);
        return -1;
    }
    s->slave = PyObject_Call(s->cls, args, kwargs);
    Py_DECREF(args);
    Py_DECREF(kwargs);
    if (!s->slave) return -1;
    /* the slave answers a refused call with CALL_ERROR only (no references to keep for
     * pythonfmu's wrapper, see JointSlave._refuse) */
    if (PyObject_SetAttrString(s->slave, "_native", Py_True) != 0) return -1;
    s->log_queue = PyObject_CallMethod(s->slave, "_get_log_queue", NULL);
    if (!s->log_queue) return -1;
    drain_log(s);
    s->state = ST_INSTANTIATED;
    s->last_time = NAN;
    s->step_refused = 0;
    return 0;
}

static int load_class(Shell *s, char *err, size_t nerr)
{
    char path[4096];
    snprintf(path, sizeof path, "%s/slavemodule.txt", s->resources);
    FILE *f = fopen(path, "r");
    if (!f) {
        snprintf(err, nerr, "cannot open %s (the FMU's resources folder is %s)", path,
                 s->resources);
        return -1;
    }
    char module[512] = {0};
    if (!fgets(module, sizeof module, f)) module[0] = '\0';
    fclose(f);
    size_t n = strlen(module);
    while (n && (module[n - 1] == '\n' || module[n - 1] == '\r' || module[n - 1] == ' '))
        module[--n] = '\0';
    if (!n) {
        snprintf(err, nerr, "%s names no Python module", path);
        return -1;
    }
    PyObject *sys_path = PySys_GetObject("path"); /* borrowed */
    PyObject *res = PyUnicode_DecodeFSDefault(s->resources);
    if (!res || !sys_path || !PyList_Check(sys_path)) {
        Py_XDECREF(res);
        snprintf(err, nerr, "cannot put %s on sys.path", s->resources);
        return -1;
    }
    int present = PySequence_Contains(sys_path, res);
    if (present == 0) present = PyList_Insert(sys_path, 0, res) == 0 ? 1 : -1;
    Py_DECREF(res);
    if (present < 0) {
        snprintf(err, nerr, "cannot put %s on sys.path", s->resources);
        return -1;
    }
    PyObject *mod = PyImport_ImportModule(module);
    if (!mod) {
        snprintf(err, nerr, "cannot import the FMU's module %s", module);
        return -1;
    }
    /* jointfmu's entry module defines the slave class under the module's own name */
    s->cls = PyObject_GetAttrString(mod, module);
    Py_DECREF(mod);
    if (!s->cls) {
        snprintf(err, nerr, "module %s has no slave class %s", module, module);
        return -1;
    }
    s->call_error = PyObject_GetAttrString(s->cls, "CALL_ERROR");
    if (!s->call_error) {
        snprintf(err, nerr, "slave class %s has no CALL_ERROR (built by another jointfmu?)",
                 module);
        return -1;
    }
    return 0;
}

static void free_shell_memory(Shell *s)
{
    if (!s) return;
    for (size_t k = 0; k < s->n_categories; k++) free(s->categories[k]);
    free(s->categories);
    free(s->instance_name);
    free(s->resources);
    s->magic = 0;
    free(s);
}

/* ------------------------------------------------------------------------------ call guards */
static Shell *as_shell(fmi2Component c)
{
    Shell *s = (Shell *)c;
    return (s && s->magic == INSTANCE_MAGIC) ? s : NULL;
}

#define SHELL_OR_ERROR(c)                                             \
    Shell *s = as_shell(c);                                           \
    if (!s) return fmi2Error;                                         \
    if (s->broken) {                                                  \
        shell_log(s, fmi2Error, "%s: the instance is unusable after an earlier fatal error; " \
                  "only fmi2FreeInstance is allowed", __func__);     \
        return fmi2Error;                                             \
    }

/* A call not allowed in the current state (sec. 4.2.4): fmi2Error, a message, nothing changed. */
static fmi2Status refuse_in_state(Shell *s, const char *call, unsigned allowed)
{
    char names[256] = "";
    size_t used = 0;
    for (int k = 0; k < N_STATES; k++) {
        if (!(allowed & IN(k))) continue;
        int n = snprintf(names + used, sizeof names - used, "%s'%s'", used ? ", " : "",
                         STATE_NAMES[k]);
        if (n < 0 || (size_t)n >= sizeof names - used) break;
        used += (size_t)n;
    }
    shell_log(s, fmi2Error, "%s is not allowed in the state '%s' (FMI 2.0 sec. 4.2.4: allowed in "
              "%s); nothing was changed", call, STATE_NAMES[s->state],
              used ? names : "no state of this FMU");
    return fmi2Error;
}

#define CHECK_STATE(call)                                                                    \
    if (!(IN(s->state) & (unsigned)MASK_##call)) return refuse_in_state(s, #call, MASK_##call)

/* The slave's FMI state (GIL held): set it to the shell's after the shell decided it. */
static void set_slave_state(Shell *s, int state)
{
    s->state = state;
    if (!s->slave) return;
    PyObject *v = PyLong_FromLong(state);
    if (!v || PyObject_SetAttrString(s->slave, "_fmi_state", v) != 0) PyErr_Clear();
    Py_XDECREF(v);
}

/* Take the slave's FMI state (GIL held), after a call in which it decided it. */
static void sync_state(Shell *s)
{
    PyObject *v = PyObject_GetAttrString(s->slave, "_fmi_state");
    long state = v ? PyLong_AsLong(v) : -1;
    Py_XDECREF(v);
    if (state < 0 || state >= N_STATES) {
        PyErr_Clear();
        state = ST_ERROR;
    }
    s->state = (int)state;
}

/* Call a slave method without arguments (the slave moves its FMI state, the shell takes it);
 * fmi2OK, or fmi2Error when the slave refused or raised. */
static fmi2Status call_plain(Shell *s, const char *method, const char *fmi_name)
{
    PyGILState_STATE g = PyGILState_Ensure();
    fmi2Status status = fmi2OK;
    s->c_step_ok = 0; /* the slave's state may change: the next doStep goes through Python */
    if (flush_inputs(s) != 0) status = fmi2Error;
    PyObject *r = status == fmi2OK ? PyObject_CallMethod(s->slave, method, NULL) : NULL;
    if (r) {
        Py_DECREF(r);
        drain_log(s);
    } else if (status == fmi2OK) {
        report_exception(s, fmi_name);
        status = fmi2Error;
    }
    sync_state(s);
    s->out_fresh = 0;
    PyGILState_Release(g);
    return status;
}

/* ========================================================= FMI 2.0 common functions (sec. 2.1) */
FMI2_EXPORT const char *fmi2GetTypesPlatform(void) { return "default"; }
FMI2_EXPORT const char *fmi2GetVersion(void) { return "2.0"; }

FMI2_EXPORT fmi2Status fmi2SetDebugLogging(fmi2Component c, fmi2Boolean loggingOn,
                                           size_t nCategories, const fmi2String categories[])
{
    SHELL_OR_ERROR(c);
    for (size_t k = 0; k < s->n_categories; k++) free(s->categories[k]);
    free(s->categories);
    s->categories = NULL;
    s->n_categories = 0;
    s->logging_on = loggingOn ? 1 : 0;
    if (nCategories && categories) {
        s->categories = calloc(nCategories, sizeof(char *));
        if (!s->categories) return fmi2Error;
        for (size_t k = 0; k < nCategories; k++)
            if (categories[k]) s->categories[s->n_categories++] = dup_str(categories[k]);
    }
    return fmi2OK;
}

FMI2_EXPORT fmi2Component fmi2Instantiate(fmi2String instanceName, fmi2Type fmuType,
                                          fmi2String fmuGUID, fmi2String fmuResourceLocation,
                                          const fmi2CallbackFunctions *functions,
                                          fmi2Boolean visible, fmi2Boolean loggingOn)
{
    (void)fmuGUID;
    if (fmuType != fmi2CoSimulation) {
        early_log(functions, instanceName,
                  "fmi2Instantiate: this FMU supports co-simulation only (fmuType "
                  "fmi2CoSimulation); model exchange is not provided");
        return NULL;
    }
    if (!fmuResourceLocation || !*fmuResourceLocation) {
        early_log(functions, instanceName,
                  "fmi2Instantiate: fmuResourceLocation is missing; the FMU needs its resources "
                  "folder (a file:// URI)");
        return NULL;
    }
    if (ensure_python() != 0) {
        early_log(functions, instanceName, "fmi2Instantiate: cannot start the Python interpreter");
        return NULL;
    }
    {
        /* compiled against this Python's headers (the full C API): another minor version in
         * the host would misread its objects, so refuse it by name */
        char want[32], msg[512];
        snprintf(want, sizeof want, "%d.%d.", PY_MAJOR_VERSION, PY_MINOR_VERSION);
        const char *have = Py_GetVersion();
        if (strncmp(have, want, strlen(want)) != 0) {
            snprintf(msg, sizeof msg, "fmi2Instantiate: this FMU's binary was built for Python "
                     "%d.%d; the host runs Python %.20s: use Python %d.%d, or rebuild the FMU "
                     "with this host's Python", PY_MAJOR_VERSION, PY_MINOR_VERSION, have,
                     PY_MAJOR_VERSION, PY_MINOR_VERSION);
            early_log(functions, instanceName, msg);
            return NULL;
        }
    }
    Shell *s = calloc(1, sizeof(Shell));
    if (!s) return NULL;
    s->magic = INSTANCE_MAGIC;
    s->instance_name = dup_str(instanceName ? instanceName : "");
    s->resources = resource_path(fmuResourceLocation);
    if (functions) s->cb = *functions;
    s->logging_on = loggingOn ? 1 : 0;
    s->visible = visible ? 1 : 0;
    s->py_pending = 1;
    if (!s->instance_name || !s->resources) {
        free_shell_memory(s);
        return NULL;
    }
    char err[1024] = {0};
    PyGILState_STATE g = PyGILState_Ensure();
    int ok = load_class(s, err, sizeof err) == 0;
    if (ok && new_slave(s) != 0) {
        snprintf(err, sizeof err, "the slave class could not be instantiated");
        ok = 0;
    }
    if (!ok) {
        char msg[1400];
        snprintf(msg, sizeof msg, "fmi2Instantiate: %s", err);
        if (PyErr_Occurred()) report_exception(s, msg);
        else send_log(s, fmi2Error, "logStatusError", msg);
        Py_CLEAR(s->log_queue);
        Py_CLEAR(s->slave);
        Py_CLEAR(s->call_error);
        Py_CLEAR(s->cls);
        drop_layout(s);
        PyGILState_Release(g);
        free_shell_memory(s);
        return NULL;
    }
    PyGILState_Release(g);
    return s;
}

FMI2_EXPORT void fmi2FreeInstance(fmi2Component c)
{
    Shell *s = as_shell(c);
    if (!s) return;
    PyGILState_STATE g = PyGILState_Ensure();
    drop_layout(s);
    Py_CLEAR(s->log_queue);
    Py_CLEAR(s->slave);
    Py_CLEAR(s->call_error);
    Py_CLEAR(s->cls);
    PyGILState_Release(g);
    free_shell_memory(s);
}

FMI2_EXPORT fmi2Status fmi2SetupExperiment(fmi2Component c, fmi2Boolean toleranceDefined,
                                           fmi2Real tolerance, fmi2Real startTime,
                                           fmi2Boolean stopTimeDefined, fmi2Real stopTime)
{
    SHELL_OR_ERROR(c);
    CHECK_STATE(fmi2SetupExperiment);
    PyGILState_STATE g = PyGILState_Ensure();
    fmi2Status status = fmi2OK;
    s->c_step_ok = 0;
    if (flush_inputs(s) != 0) status = fmi2Error;
    PyObject *r = status != fmi2OK ? NULL
        : PyObject_CallMethod(s->slave, "setup_experiment", "(dNN)", startTime,
                              stopTimeDefined ? PyFloat_FromDouble(stopTime) : new_none(),
                              toleranceDefined ? PyFloat_FromDouble(tolerance) : new_none());
    if (r) {
        Py_DECREF(r);
        drain_log(s);
    } else if (status == fmi2OK) {
        report_exception(s, "fmi2SetupExperiment");
        status = fmi2Error;
    }
    PyGILState_Release(g);
    return status;
}

FMI2_EXPORT fmi2Status fmi2EnterInitializationMode(fmi2Component c)
{
    SHELL_OR_ERROR(c);
    CHECK_STATE(fmi2EnterInitializationMode);
    return call_plain(s, "enter_initialization_mode", "fmi2EnterInitializationMode");
}

/* The simulator is made here: parameters out of range are refused (fmi2Error, the messages of
 * `jointfmu check`) and leave the instance in the error state. */
FMI2_EXPORT fmi2Status fmi2ExitInitializationMode(fmi2Component c)
{
    SHELL_OR_ERROR(c);
    CHECK_STATE(fmi2ExitInitializationMode);
    fmi2Status status = call_plain(s, "exit_initialization_mode", "fmi2ExitInitializationMode");
    PyGILState_STATE g = PyGILState_Ensure();
    fetch_layout(s);
    PyGILState_Release(g);
    return status;
}

FMI2_EXPORT fmi2Status fmi2Terminate(fmi2Component c)
{
    SHELL_OR_ERROR(c);
    CHECK_STATE(fmi2Terminate);
    return call_plain(s, "terminate", "fmi2Terminate");
}

FMI2_EXPORT fmi2Status fmi2Reset(fmi2Component c)
{
    SHELL_OR_ERROR(c);
    CHECK_STATE(fmi2Reset);
    /* as pythonfmu does: a new slave instance, as after fmi2Instantiate (state instantiated) */
    PyGILState_STATE g = PyGILState_Ensure();
    fmi2Status status = fmi2OK;
    if (new_slave(s) != 0) {
        report_exception(s, "fmi2Reset: the slave could not be instantiated anew");
        s->broken = 1;
        status = fmi2Fatal;
    }
    PyGILState_Release(g);
    return status;
}

/* ------------------------------------------------------------------------------- get / set */
static fmi2Status python_set_real(Shell *s, const fmi2ValueReference vr[], size_t nvr,
                                  const fmi2Real value[])
{
    PyGILState_STATE g = PyGILState_Ensure();
    fmi2Status status = fmi2OK;
    PyObject *vrs = NULL, *vals = NULL, *r = NULL;
    s->c_step_ok = 0; /* parameters may change: the next doStep goes through Python */
    if (flush_inputs(s) != 0) {
        status = fmi2Error;
        goto done;
    }
    vrs = PyList_New((Py_ssize_t)nvr);
    vals = PyList_New((Py_ssize_t)nvr);
    if (!vrs || !vals) goto error;
    for (size_t k = 0; k < nvr; k++) {
        PyObject *a = PyLong_FromUnsignedLong(vr[k]);
        PyObject *b = PyFloat_FromDouble(value[k]);
        if (!a || !b) {
            Py_XDECREF(a);
            Py_XDECREF(b);
            goto error;
        }
        PyList_SET_ITEM(vrs, (Py_ssize_t)k, a);
        PyList_SET_ITEM(vals, (Py_ssize_t)k, b);
    }
    r = PyObject_CallMethod(s->slave, "set_real", "(OO)", vrs, vals);
    if (!r) goto error;
    drain_log(s);
    goto done;
error:
    report_exception(s, "fmi2SetReal");
    status = fmi2Error;
done:
    Py_XDECREF(r);
    Py_XDECREF(vrs);
    Py_XDECREF(vals);
    /* the slave may now hold an input it has not handed to its simulator (a refused value, or
     * one set before the simulator exists): later inputs go through Python until it has */
    if (s->has_layout) {
        for (size_t k = 0; k < nvr; k++)
            if ((Py_ssize_t)vr[k] < s->n_vars && s->in_pos[vr[k]] >= 0) s->py_pending = 1;
    }
    s->out_fresh = 0;
    PyGILState_Release(g);
    return status;
}

FMI2_EXPORT fmi2Status fmi2SetReal(fmi2Component c, const fmi2ValueReference vr[], size_t nvr,
                                   const fmi2Real value[])
{
    SHELL_OR_ERROR(c);
    CHECK_STATE(fmi2SetReal);
    if (nvr == 0) return fmi2OK;
    if (!vr || !value) {
        shell_log(s, fmi2Error, "fmi2SetReal: vr or value is NULL with nvr = %zu", nvr);
        return fmi2Error;
    }
    if (s->has_layout && !s->py_pending && s->state == ST_STEP_COMPLETE) {
        /* the fast path: every value a valid input (the checks of
         * ModalSimulator.set_input_value), or the whole call goes through Python */
        size_t k;
        for (k = 0; k < nvr; k++) {
            fmi2ValueReference r = vr[k];
            if ((Py_ssize_t)r >= s->n_vars) break;
            Py_ssize_t p = s->in_pos[r];
            double x = value[k];
            if (p < 0 || !(x >= -s->max_input && x <= s->max_input)) break; /* NaN fails */
            if (p == s->base_pos && !s->has_base && x != 0.0) break;
        }
        if (k == nvr) {
            for (k = 0; k < nvr; k++) {
                fmi2ValueReference r = vr[k];
                s->u[s->in_pos[r]] = value[k];
                if (!s->dirty_mark[r]) {
                    s->dirty_mark[r] = 1;
                    s->dirty[s->n_dirty++] = r;
                }
            }
            s->out_fresh = 0;
            return fmi2OK;
        }
    }
    return python_set_real(s, vr, nvr, value);
}

static fmi2Status python_get_real(Shell *s, const fmi2ValueReference vr[], size_t nvr,
                                  fmi2Real value[])
{
    PyGILState_STATE g = PyGILState_Ensure();
    fmi2Status status = fmi2OK;
    PyObject *vrs = NULL, *r = NULL;
    if (flush_inputs(s) != 0) {
        status = fmi2Error;
        goto done;
    }
    vrs = PyList_New((Py_ssize_t)nvr);
    if (!vrs) goto error;
    for (size_t k = 0; k < nvr; k++) {
        PyObject *a = PyLong_FromUnsignedLong(vr[k]);
        if (!a) goto error;
        PyList_SET_ITEM(vrs, (Py_ssize_t)k, a);
    }
    r = PyObject_CallMethod(s->slave, "get_real", "(O)", vrs);
    if (!r) goto error;
    {
        PyObject *seq = PySequence_Fast(r, "get_real must return a sequence");
        if (!seq) goto error;
        if (PySequence_Fast_GET_SIZE(seq) != (Py_ssize_t)nvr) {
            Py_DECREF(seq);
            PyErr_Format(PyExc_ValueError, "get_real returned %zd values for %zu value references",
                         PySequence_Fast_GET_SIZE(r), nvr);
            goto error;
        }
        for (size_t k = 0; k < nvr; k++) {
            double x = PyFloat_AsDouble(PySequence_Fast_GET_ITEM(seq, (Py_ssize_t)k));
            if (x == -1.0 && PyErr_Occurred()) {
                Py_DECREF(seq);
                goto error;
            }
            value[k] = x;
        }
        Py_DECREF(seq);
    }
    drain_log(s);
    goto done;
error:
    report_exception(s, "fmi2GetReal");
    status = fmi2Error;
done:
    Py_XDECREF(r);
    Py_XDECREF(vrs);
    s->out_fresh = 0; /* the slave may have refreshed, or not: ask it again next time */
    PyGILState_Release(g);
    return status;
}

/* Bring the output buffer in line with the state and the inputs (one Python call); 0 when the
 * buffer can be read. */
static int refresh_outputs(Shell *s)
{
    PyGILState_STATE g = PyGILState_Ensure();
    int ok = 0;
    PyObject *t = take_dirty(s);
    PyObject *r = t ? PyObject_CallMethod(s->slave, "_native_refresh", "(O)", t) : NULL;
    Py_XDECREF(t);
    if (!r) {
        report_exception(s, "fmi2GetReal: refreshing the outputs");
    } else {
        long flags = PyLong_AsLong(r);
        Py_DECREF(r);
        if (flags == -1 && PyErr_Occurred()) {
            report_exception(s, "fmi2GetReal: refreshing the outputs");
        } else {
            s->py_pending = (flags & 2) != 0;
            s->out_fresh = (flags & 1) != 0;
            ok = s->out_fresh && !s->py_pending;
        }
        drain_log(s);
    }
    PyGILState_Release(g);
    return ok ? 0 : -1;
}

FMI2_EXPORT fmi2Status fmi2GetReal(fmi2Component c, const fmi2ValueReference vr[], size_t nvr,
                                   fmi2Real value[])
{
    SHELL_OR_ERROR(c);
    CHECK_STATE(fmi2GetReal);
    if (nvr == 0) return fmi2OK;
    if (!vr || !value) {
        shell_log(s, fmi2Error, "fmi2GetReal: vr or value is NULL with nvr = %zu", nvr);
        return fmi2Error;
    }
    if (s->has_layout) {
        /* outputs only: read the buffer, refreshed first (one Python call) if inputs changed
         * or the slave still holds inputs back; anything else goes through get_real */
        size_t k;
        for (k = 0; k < nvr; k++)
            if ((Py_ssize_t)vr[k] >= s->n_vars || s->out_pos[vr[k]] < 0) break;
        if (k == nvr && ((s->out_fresh && !s->py_pending) || refresh_outputs(s) == 0)) {
            const double *y = s->y;
            const Py_ssize_t *op = s->out_pos;
            for (k = 0; k < nvr; k++) value[k] = y[op[vr[k]]];
            return fmi2OK;
        }
    }
    return python_get_real(s, vr, nvr, value);
}

/* No Integer, Boolean or String variables (modelDescription.xml): only empty calls succeed. */
#define NO_VARIABLES_OF_TYPE(fname, tname)                                                   \
    SHELL_OR_ERROR(c);                                                                       \
    CHECK_STATE(fname);                                                                      \
    (void)vr;                                                                                \
    (void)value;                                                                             \
    if (nvr == 0) return fmi2OK;                                                             \
    shell_log(s, fmi2Error, "%s: this FMU has no %s variables (value reference %u); its "    \
              "variables are all Real, as in modelDescription.xml", #fname, tname,           \
              vr ? vr[0] : 0u);                                                              \
    return fmi2Error;

FMI2_EXPORT fmi2Status fmi2GetInteger(fmi2Component c, const fmi2ValueReference vr[], size_t nvr,
                                      fmi2Integer value[])
{
    NO_VARIABLES_OF_TYPE(fmi2GetInteger, "Integer")
}

FMI2_EXPORT fmi2Status fmi2GetBoolean(fmi2Component c, const fmi2ValueReference vr[], size_t nvr,
                                      fmi2Boolean value[])
{
    NO_VARIABLES_OF_TYPE(fmi2GetBoolean, "Boolean")
}

FMI2_EXPORT fmi2Status fmi2GetString(fmi2Component c, const fmi2ValueReference vr[], size_t nvr,
                                     fmi2String value[])
{
    NO_VARIABLES_OF_TYPE(fmi2GetString, "String")
}

FMI2_EXPORT fmi2Status fmi2SetInteger(fmi2Component c, const fmi2ValueReference vr[], size_t nvr,
                                      const fmi2Integer value[])
{
    NO_VARIABLES_OF_TYPE(fmi2SetInteger, "Integer")
}

FMI2_EXPORT fmi2Status fmi2SetBoolean(fmi2Component c, const fmi2ValueReference vr[], size_t nvr,
                                      const fmi2Boolean value[])
{
    NO_VARIABLES_OF_TYPE(fmi2SetBoolean, "Boolean")
}

FMI2_EXPORT fmi2Status fmi2SetString(fmi2Component c, const fmi2ValueReference vr[], size_t nvr,
                                     const fmi2String value[])
{
    NO_VARIABLES_OF_TYPE(fmi2SetString, "String")
}

/* -------------------------------------------------------------------- FMU state (sec. 2.1.8) */
static ShellState *as_state(fmi2FMUstate st)
{
    ShellState *p = (ShellState *)st;
    return (p && p->magic == STATE_MAGIC) ? p : NULL;
}

static fmi2Status wrap_state(Shell *s, PyObject *obj, fmi2FMUstate *FMUstate)
{
    /* sec. 2.1.8: a non-NULL *FMUstate from an earlier call is overwritten */
    ShellState *old = as_state(*FMUstate);
    if (old) {
        PyObject *prev = old->obj;
        old->obj = obj;
        Py_XDECREF(prev);
        return fmi2OK;
    }
    ShellState *p = malloc(sizeof(ShellState));
    if (!p) {
        Py_DECREF(obj);
        shell_log(s, fmi2Error, "fmi2GetFMUstate: out of memory");
        return fmi2Error;
    }
    p->magic = STATE_MAGIC;
    p->obj = obj;
    *FMUstate = p;
    return fmi2OK;
}

FMI2_EXPORT fmi2Status fmi2GetFMUstate(fmi2Component c, fmi2FMUstate *FMUstate)
{
    SHELL_OR_ERROR(c);
    if (!FMUstate) {
        shell_log(s, fmi2Error, "fmi2GetFMUstate: FMUstate is NULL");
        return fmi2Error;
    }
    PyGILState_STATE g = PyGILState_Ensure();
    fmi2Status status = fmi2Error;
    if (flush_inputs(s) == 0) {
        PyObject *obj = PyObject_CallMethod(s->slave, "_get_fmu_state", NULL);
        if (!obj) {
            report_exception(s, "fmi2GetFMUstate");
        } else {
            drain_log(s);
            status = wrap_state(s, obj, FMUstate);
        }
    }
    PyGILState_Release(g);
    return status;
}

FMI2_EXPORT fmi2Status fmi2SetFMUstate(fmi2Component c, fmi2FMUstate FMUstate)
{
    SHELL_OR_ERROR(c);
    ShellState *st = as_state(FMUstate);
    if (!st) {
        shell_log(s, fmi2Error, "fmi2SetFMUstate: not an FMU state of this FMU (allowed are "
                  "states from fmi2GetFMUstate or fmi2DeSerializeFMUstate)");
        return fmi2Error;
    }
    PyGILState_STATE g = PyGILState_Ensure();
    fmi2Status status = fmi2OK;
    /* inputs written since are the slave's first (a state it rejects leaves them in place) */
    PyObject *r = flush_inputs(s) == 0
        ? PyObject_CallMethod(s->slave, "_set_fmu_state", "(O)", st->obj) : NULL;
    if (!r) {
        if (PyErr_Occurred()) report_exception(s, "fmi2SetFMUstate");
        status = fmi2Error;
    } else {
        Py_DECREF(r);
        drain_log(s);
        /* the FMI state saved with the FMU state; fmi2Terminated answers for it */
        sync_state(s);
        s->step_refused = s->state == ST_STEP_FAILED;
    }
    fetch_layout(s); /* the slave may have made or dropped its simulator */
    PyGILState_Release(g);
    return status;
}

FMI2_EXPORT fmi2Status fmi2FreeFMUstate(fmi2Component c, fmi2FMUstate *FMUstate)
{
    Shell *s = as_shell(c);
    if (!s) return fmi2Error;
    if (!FMUstate || !*FMUstate) return fmi2OK;
    ShellState *st = as_state(*FMUstate);
    if (!st) {
        shell_log(s, fmi2Error, "fmi2FreeFMUstate: not an FMU state of this FMU");
        return fmi2Error;
    }
    PyGILState_STATE g = PyGILState_Ensure();
    Py_CLEAR(st->obj);
    PyGILState_Release(g);
    st->magic = 0;
    free(st);
    *FMUstate = NULL;
    return fmi2OK;
}

/* The serialized state: the class's _fmu_state_to_bytes (GIL held); NULL after an exception. */
static PyObject *state_bytes(Shell *s, ShellState *st, const char *fmi_name)
{
    PyObject *b = PyObject_CallMethod(s->cls, "_fmu_state_to_bytes", "(O)", st->obj);
    if (b && !PyBytes_Check(b)) {
        PyObject *conv = PyBytes_FromObject(b);
        Py_DECREF(b);
        b = conv;
    }
    if (!b) report_exception(s, fmi_name);
    return b;
}

FMI2_EXPORT fmi2Status fmi2SerializedFMUstateSize(fmi2Component c, fmi2FMUstate FMUstate,
                                                  size_t *size)
{
    SHELL_OR_ERROR(c);
    ShellState *st = as_state(FMUstate);
    if (!st || !size) {
        shell_log(s, fmi2Error, "fmi2SerializedFMUstateSize: not an FMU state of this FMU, or "
                  "size is NULL");
        return fmi2Error;
    }
    PyGILState_STATE g = PyGILState_Ensure();
    PyObject *b = state_bytes(s, st, "fmi2SerializedFMUstateSize");
    fmi2Status status = b ? fmi2OK : fmi2Error;
    if (b) {
        *size = (size_t)PyBytes_GET_SIZE(b);
        Py_DECREF(b);
        drain_log(s);
    }
    PyGILState_Release(g);
    return status;
}

FMI2_EXPORT fmi2Status fmi2SerializeFMUstate(fmi2Component c, fmi2FMUstate FMUstate,
                                             fmi2Byte serializedState[], size_t size)
{
    SHELL_OR_ERROR(c);
    ShellState *st = as_state(FMUstate);
    if (!st || !serializedState) {
        shell_log(s, fmi2Error, "fmi2SerializeFMUstate: not an FMU state of this FMU, or "
                  "serializedState is NULL");
        return fmi2Error;
    }
    PyGILState_STATE g = PyGILState_Ensure();
    PyObject *b = state_bytes(s, st, "fmi2SerializeFMUstate");
    fmi2Status status = fmi2Error;
    if (b) {
        size_t n = (size_t)PyBytes_GET_SIZE(b);
        if (n > size) {
            shell_log(s, fmi2Error, "fmi2SerializeFMUstate: the state needs %zu bytes, size is "
                      "%zu (from fmi2SerializedFMUstateSize)", n, size);
        } else {
            memcpy(serializedState, PyBytes_AS_STRING(b), n);
            status = fmi2OK;
        }
        Py_DECREF(b);
        drain_log(s);
    }
    PyGILState_Release(g);
    return status;
}

FMI2_EXPORT fmi2Status fmi2DeSerializeFMUstate(fmi2Component c, const fmi2Byte serializedState[],
                                               size_t size, fmi2FMUstate *FMUstate)
{
    SHELL_OR_ERROR(c);
    if (!serializedState || !FMUstate) {
        shell_log(s, fmi2Error, "fmi2DeSerializeFMUstate: serializedState or FMUstate is NULL");
        return fmi2Error;
    }
    PyGILState_STATE g = PyGILState_Ensure();
    fmi2Status status = fmi2Error;
    PyObject *b = PyBytes_FromStringAndSize(serializedState, (Py_ssize_t)size);
    /* a corrupt, truncated or other build's state is refused here already (fmi2SetFMUstate
     * checks again, against the simulator too) */
    PyObject *problem = b ? PyObject_CallMethod(s->slave, "_state_problem", "(O)", b) : NULL;
    PyObject *obj = NULL;
    if (problem && problem != Py_None) {
        PyObject *text = PyObject_Str(problem);
        const char *t = text ? PyUnicode_AsUTF8(text) : NULL;
        PyErr_Clear();
        shell_log(s, fmi2Error, "fmi2DeSerializeFMUstate: FMU state rejected: %s",
                  t ? t : "(unreadable reason)");
        Py_XDECREF(text);
    } else if (problem) {
        obj = PyObject_CallMethod(s->cls, "_fmu_state_from_bytes", "(O)", b);
        if (!obj) {
            report_exception(s, "fmi2DeSerializeFMUstate");
        } else {
            drain_log(s);
            status = wrap_state(s, obj, FMUstate);
        }
    } else {
        report_exception(s, "fmi2DeSerializeFMUstate");
    }
    Py_XDECREF(problem);
    Py_XDECREF(b);
    PyGILState_Release(g);
    return status;
}

FMI2_EXPORT fmi2Status fmi2GetDirectionalDerivative(fmi2Component c,
                                                    const fmi2ValueReference vUnknown_ref[],
                                                    size_t nUnknown,
                                                    const fmi2ValueReference vKnown_ref[],
                                                    size_t nKnown, const fmi2Real dvKnown[],
                                                    fmi2Real dvUnknown[])
{
    (void)vUnknown_ref, (void)nUnknown, (void)vKnown_ref, (void)nKnown, (void)dvKnown,
        (void)dvUnknown;
    SHELL_OR_ERROR(c);
    CHECK_STATE(fmi2GetDirectionalDerivative);
    shell_log(s, fmi2Error, "fmi2GetDirectionalDerivative is not supported "
              "(providesDirectionalDerivative=\"false\" in modelDescription.xml)");
    return fmi2Error;
}

/* ==================================================== FMI 2.0 co-simulation functions (sec. 4.2) */
FMI2_EXPORT fmi2Status fmi2SetRealInputDerivatives(fmi2Component c, const fmi2ValueReference vr[],
                                                   size_t nvr, const fmi2Integer order[],
                                                   const fmi2Real value[])
{
    (void)vr, (void)order, (void)value;
    SHELL_OR_ERROR(c);
    CHECK_STATE(fmi2SetRealInputDerivatives);
    if (nvr == 0) return fmi2OK;
    shell_log(s, fmi2Error, "fmi2SetRealInputDerivatives is not supported: inputs are held over "
              "a step (canInterpolateInputs=\"false\" in modelDescription.xml)");
    return fmi2Error;
}

FMI2_EXPORT fmi2Status fmi2GetRealOutputDerivatives(fmi2Component c, const fmi2ValueReference vr[],
                                                    size_t nvr, const fmi2Integer order[],
                                                    fmi2Real value[])
{
    (void)vr, (void)order, (void)value;
    SHELL_OR_ERROR(c);
    CHECK_STATE(fmi2GetRealOutputDerivatives);
    if (nvr == 0) return fmi2OK;
    shell_log(s, fmi2Error, "fmi2GetRealOutputDerivatives is not supported "
              "(maxOutputDerivativeOrder is 0 in modelDescription.xml)");
    return fmi2Error;
}

FMI2_EXPORT fmi2Status fmi2DoStep(fmi2Component c, fmi2Real currentCommunicationPoint,
                                  fmi2Real communicationStepSize,
                                  fmi2Boolean noSetFMUStatePriorToCurrentPoint)
{
    (void)noSetFMUStatePriorToCurrentPoint;
    SHELL_OR_ERROR(c);
    CHECK_STATE(fmi2DoStep);
    if (compiled_do_step(s, communicationStepSize)) {
        /* as below for a step taken (sec. 4.2.3): the state stays "step complete" */
        s->step_refused = 0;
        s->last_time = currentCommunicationPoint + communicationStepSize;
        return fmi2OK;
    }
    PyGILState_STATE g = PyGILState_Ensure();
    fmi2Status status = fmi2Error;
    PyObject *t = take_dirty(s);
    PyObject *r = t ? PyObject_CallMethod(s->slave, "_native_do_step", "(ddO)",
                                          currentCommunicationPoint, communicationStepSize, t)
                    : NULL;
    Py_XDECREF(t);
    long flags = 0;
    if (r) {
        flags = PyLong_AsLong(r);
        Py_DECREF(r);
    }
    if (!r || (flags == -1 && PyErr_Occurred())) {
        report_exception(s, "fmi2DoStep");
        s->out_fresh = 0;
        fetch_layout(s);
    } else {
        drain_log(s);
        /* bit 0: stepped (fmi2OK) or refused (fmi2Discard, sec. 4.2.2); bit 1: the slave made a
         * new simulator; bit 2: its outputs are current; bit 3: the next steps may run
         * compiled */
        status = (flags & 1) ? fmi2OK : fmi2Discard;
        if (flags & 2) fetch_layout(s);
        if (flags & 1) s->py_pending = 0; /* doStep hands every held input over */
        s->out_fresh = (flags & 4) != 0;
        /* sec. 4.2.3: fmi2LastSuccessfulTime is the end of the last step taken; a refused step
         * ends at its start, and fmi2Terminated says the slave cannot go on by itself */
        s->state = (flags & 1) ? ST_STEP_COMPLETE : ST_STEP_FAILED;
        s->step_refused = !(flags & 1);
        s->last_time = (flags & 1) ? currentCommunicationPoint + communicationStepSize
                                   : currentCommunicationPoint;
        s->c_step_ok = (flags & 8) != 0;
    }
    PyGILState_Release(g);
    return status;
}

FMI2_EXPORT fmi2Status fmi2CancelStep(fmi2Component c)
{
    SHELL_OR_ERROR(c);
    CHECK_STATE(fmi2CancelStep);
    shell_log(s, fmi2Error, "fmi2CancelStep is not supported: doStep always completes before it "
              "returns (canRunAsynchronuously=\"false\")");
    return fmi2Error;
}

/* ------------------------------------------------------------- status queries (sec. 4.2.3)
 * What a master asks after fmi2DoStep returned fmi2Discard: fmi2Terminated (true: the last step
 * was refused and the slave cannot go on by itself; it needs an FMU state restored, or a reset)
 * and fmi2LastSuccessfulTime (the end of the last step taken; the start of a refused step; NaN
 * before the first step).  pythonfmu 0.7.0's binary answers these two the same way.  doStep
 * never returns fmi2Pending, so the other kinds have nothing to report: fmi2Discard, as sec.
 * 2.1.3 says for a status the slave cannot return. */
static fmi2Status no_status(Shell *s, const char *call, fmi2StatusKind kind)
{
    shell_log(s, fmi2Discard, "%s: status kind %d has nothing to report (doStep never returns "
              "fmi2Pending); this FMU answers fmi2GetBooleanStatus(fmi2Terminated) and "
              "fmi2GetRealStatus(fmi2LastSuccessfulTime)", call, (int)kind);
    return fmi2Discard;
}

#define STATUS_ARGS(call)                                                                     \
    SHELL_OR_ERROR(c);                                                                        \
    CHECK_STATE(call);                                                                        \
    if (!value) {                                                                             \
        shell_log(s, fmi2Error, "%s: value is NULL", #call);                                  \
        return fmi2Error;                                                                     \
    }

FMI2_EXPORT fmi2Status fmi2GetStatus(fmi2Component c, const fmi2StatusKind s_kind,
                                     fmi2Status *value)
{
    STATUS_ARGS(fmi2GetStatus);
    return no_status(s, "fmi2GetStatus", s_kind);
}

FMI2_EXPORT fmi2Status fmi2GetRealStatus(fmi2Component c, const fmi2StatusKind s_kind,
                                         fmi2Real *value)
{
    STATUS_ARGS(fmi2GetRealStatus);
    if (s_kind != fmi2LastSuccessfulTime) return no_status(s, "fmi2GetRealStatus", s_kind);
    *value = s->last_time;
    return fmi2OK;
}

FMI2_EXPORT fmi2Status fmi2GetIntegerStatus(fmi2Component c, const fmi2StatusKind s_kind,
                                            fmi2Integer *value)
{
    STATUS_ARGS(fmi2GetIntegerStatus);
    return no_status(s, "fmi2GetIntegerStatus", s_kind);
}

FMI2_EXPORT fmi2Status fmi2GetBooleanStatus(fmi2Component c, const fmi2StatusKind s_kind,
                                            fmi2Boolean *value)
{
    STATUS_ARGS(fmi2GetBooleanStatus);
    if (s_kind != fmi2Terminated) return no_status(s, "fmi2GetBooleanStatus", s_kind);
    *value = s->step_refused ? 1 : 0;
    return fmi2OK;
}

FMI2_EXPORT fmi2Status fmi2GetStringStatus(fmi2Component c, const fmi2StatusKind s_kind,
                                           fmi2String *value)
{
    STATUS_ARGS(fmi2GetStringStatus);
    return no_status(s, "fmi2GetStringStatus", s_kind);
}
