/* A minimal FMI 2.0 co-simulation master in C, for tests/test_fmu_c_master.py.
 *
 * It plays a host that is not Python: it loads libpython with RTLD_GLOBAL first (the pythonfmu
 * binary inside a jointfmu FMU takes the Python C API from the process and links no libpython),
 * then the FMU's binary, and drives it through the FMI 2.0 C API (types and calling sequence
 * from the FMI 2.0 standard, sec. 2.1 and 4.2).
 *
 * usage: fmi2_master LIBPYTHON FMU_BINARY RESOURCE_URI GUID DT N IN_VR OUT_VR[,OUT_VR...]
 * stdin: N input values (one per communication step, held over the step); with DT "-", N pairs
 *        "step_size input_value" instead (the communication points their running sum)
 * stdout: "S k t y1 y2 ..." for k = 0..N, then, after restoring the FMU state saved at
 *         k = N/2 (fmi2GetFMUstate/fmi2SetFMUstate), "R k t y1 ..." for k = N/2+1..N.
 *
 * Timing mode, for tests/bench/bench_speed.py (a host loop in C: its cost per step is the
 * FMU's, with no host interpreter in between):
 * usage: fmi2_master --time LIBPYTHON FMU_BINARY RESOURCE_URI GUID DT[,DT...] N ROUNDS IN_VR AMP
 *        FREQ OUT_VR[,OUT_VR...]
 *         each round runs, for each DT in turn, N communication steps of: fmi2SetReal of the
 *         input (AMP sin(2 pi FREQ t)), fmi2DoStep, fmi2GetReal of the outputs; the time
 *         runs on across the loops.
 * stdout: "T DT seconds_per_step" per DT, the fastest round (the least disturbed).
 *
 * exit status: 0 ok, 2 usage, 3 load failure, 4 FMI call failed.
 */
#include <dlfcn.h>
#include <math.h>
#include <stdarg.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

typedef void *fmi2Component;
typedef void *fmi2ComponentEnvironment;
typedef void *fmi2FMUstate;
typedef unsigned int fmi2ValueReference;
typedef double fmi2Real;
typedef int fmi2Boolean;
typedef const char *fmi2String;
typedef enum { fmi2OK, fmi2Warning, fmi2Discard, fmi2Error, fmi2Fatal, fmi2Pending } fmi2Status;
typedef enum { fmi2ModelExchange, fmi2CoSimulation } fmi2Type;

typedef struct {
    void (*logger)(fmi2ComponentEnvironment, fmi2String, fmi2Status, fmi2String, fmi2String, ...);
    void *(*allocateMemory)(size_t, size_t);
    void (*freeMemory)(void *);
    void (*stepFinished)(fmi2ComponentEnvironment, fmi2Status);
    fmi2ComponentEnvironment componentEnvironment;
} fmi2CallbackFunctions;

typedef fmi2Component (*Instantiate)(fmi2String, fmi2Type, fmi2String, fmi2String,
                                     const fmi2CallbackFunctions *, fmi2Boolean, fmi2Boolean);
typedef fmi2Status (*SetupExperiment)(fmi2Component, fmi2Boolean, fmi2Real, fmi2Real, fmi2Boolean,
                                      fmi2Real);
typedef fmi2Status (*Plain)(fmi2Component);
typedef void (*FreeInstance)(fmi2Component);
typedef fmi2Status (*RealIO)(fmi2Component, const fmi2ValueReference *, size_t, fmi2Real *);
typedef fmi2Status (*DoStep)(fmi2Component, fmi2Real, fmi2Real, fmi2Boolean);
typedef fmi2Status (*StateIO)(fmi2Component, fmi2FMUstate *);
typedef fmi2Status (*SetState)(fmi2Component, fmi2FMUstate);

static void logger(fmi2ComponentEnvironment env, fmi2String name, fmi2Status status,
                   fmi2String category, fmi2String message, ...)
{
    (void)env;
    va_list args;
    va_start(args, message);
    fprintf(stderr, "[%s status %d %s] ", name, (int)status, category ? category : "");
    vfprintf(stderr, message, args);
    fputc('\n', stderr);
    va_end(args);
}

static void *sym(void *lib, const char *name)
{
    void *f = dlsym(lib, name);
    if (!f) {
        fprintf(stderr, "missing symbol %s\n", name);
        exit(3);
    }
    return f;
}

#define CHECK(call)                                                        \
    do {                                                                   \
        fmi2Status s_ = (call);                                            \
        if (s_ > fmi2Warning) {                                            \
            fprintf(stderr, "%s returned status %d\n", #call, (int)s_);    \
            return 4;                                                      \
        }                                                                  \
    } while (0)

static size_t parse_list(char *text, double *out, size_t cap)
{
    size_t n = 0;
    for (char *tok = strtok(text, ","); tok && n < cap; tok = strtok(NULL, ","))
        out[n++] = atof(tok);
    return n;
}

static double now(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_MONOTONIC, &ts);
    return (double)ts.tv_sec + 1e-9 * (double)ts.tv_nsec;
}

static int time_main(int argc, char **argv)
{
    if (argc != 12) {
        fprintf(stderr, "usage: fmi2_master --time LIBPYTHON FMU_BINARY RESOURCE_URI GUID "
                "DT[,DT...] N ROUNDS IN_VR AMP FREQ OUT_VRS\n");
        return 2;
    }
    if (!dlopen(argv[1], RTLD_NOW | RTLD_GLOBAL)) {
        fprintf(stderr, "cannot load %s: %s\n", argv[1], dlerror());
        return 3;
    }
    void *lib = dlopen(argv[2], RTLD_NOW | RTLD_LOCAL);
    if (!lib) {
        fprintf(stderr, "cannot load %s: %s\n", argv[2], dlerror());
        return 3;
    }
    double dts[16], outs_d[64];
    size_t n_dt = parse_list(argv[5], dts, 16);
    int n = atoi(argv[6]), rounds = atoi(argv[7]);
    fmi2ValueReference in_vr = (fmi2ValueReference)atoi(argv[8]);
    double amp = atof(argv[9]), w = 2.0 * 3.14159265358979323846 * atof(argv[10]);
    size_t n_out = parse_list(argv[11], outs_d, 64);
    fmi2ValueReference out_vr[64];
    for (size_t j = 0; j < n_out; j++) out_vr[j] = (fmi2ValueReference)outs_d[j];
    if (n_dt == 0 || n <= 0 || rounds <= 0) return 2;

    Instantiate instantiate = (Instantiate)sym(lib, "fmi2Instantiate");
    SetupExperiment setup = (SetupExperiment)sym(lib, "fmi2SetupExperiment");
    Plain enter = (Plain)sym(lib, "fmi2EnterInitializationMode");
    Plain exit_ = (Plain)sym(lib, "fmi2ExitInitializationMode");
    Plain terminate = (Plain)sym(lib, "fmi2Terminate");
    FreeInstance free_instance = (FreeInstance)sym(lib, "fmi2FreeInstance");
    RealIO set_real = (RealIO)sym(lib, "fmi2SetReal");
    RealIO get_real = (RealIO)sym(lib, "fmi2GetReal");
    DoStep do_step = (DoStep)sym(lib, "fmi2DoStep");

    fmi2CallbackFunctions cb = {logger, calloc, free, NULL, NULL};
    fmi2Component c = instantiate("c_master_timing", fmi2CoSimulation, argv[4], argv[3], &cb, 0,
                                  0);
    if (!c) {
        fprintf(stderr, "fmi2Instantiate failed\n");
        return 4;
    }
    CHECK(setup(c, 0, 0.0, 0.0, 0, 0.0));
    CHECK(enter(c));
    CHECK(exit_(c));
    double best[16], t = 0.0;
    fmi2Real y[64];
    for (size_t d = 0; d < n_dt; d++) best[d] = INFINITY;
    for (int r = 0; r < rounds; r++) {
        for (size_t d = 0; d < n_dt; d++) {
            double dt = dts[d], t0 = now();
            for (int k = 0; k < n; k++) {
                fmi2Real x = amp * sin(w * t);
                CHECK(set_real(c, &in_vr, 1, &x));
                CHECK(do_step(c, t, dt, 1));
                CHECK(get_real(c, out_vr, n_out, y));
                t += dt;
            }
            double el = (now() - t0) / n;
            if (el < best[d]) best[d] = el;
        }
    }
    for (size_t d = 0; d < n_dt; d++) printf("T %.17g %.9g\n", dts[d], best[d]);
    CHECK(terminate(c));
    free_instance(c);
    return 0;
}

int main(int argc, char **argv)
{
    if (argc > 1 && strcmp(argv[1], "--time") == 0) return time_main(argc - 1, argv + 1);
    if (argc != 9) {
        fprintf(stderr, "usage: %s LIBPYTHON FMU_BINARY RESOURCE_URI GUID DT N IN_VR OUT_VRS\n",
                argv[0]);
        return 2;
    }
    if (!dlopen(argv[1], RTLD_NOW | RTLD_GLOBAL)) {
        fprintf(stderr, "cannot load %s: %s\n", argv[1], dlerror());
        return 3;
    }
    void *lib = dlopen(argv[2], RTLD_NOW | RTLD_LOCAL);
    if (!lib) {
        fprintf(stderr, "cannot load %s: %s\n", argv[2], dlerror());
        return 3;
    }
    int varied = strcmp(argv[5], "-") == 0;
    double dt = varied ? 0.0 : atof(argv[5]);
    int n = atoi(argv[6]);
    fmi2ValueReference in_vr = (fmi2ValueReference)atoi(argv[7]);
    fmi2ValueReference out_vr[64];
    size_t n_out = 0;
    for (char *tok = strtok(argv[8], ","); tok && n_out < 64; tok = strtok(NULL, ","))
        out_vr[n_out++] = (fmi2ValueReference)atoi(tok);
    double *u = calloc((size_t)n + 1, sizeof(double));
    double *h = calloc((size_t)n + 1, sizeof(double));
    double *t = calloc((size_t)n + 1, sizeof(double)); /* communication points */
    for (int k = 0; k < n; k++) {
        if (varied ? scanf("%lf %lf", &h[k], &u[k]) != 2 : scanf("%lf", &u[k]) != 1) {
            fprintf(stderr, "expected %d %s on stdin\n", n,
                    varied ? "pairs of step size and input value" : "input values");
            return 2;
        }
        if (!varied) h[k] = dt;
        t[k + 1] = varied ? t[k] + h[k] : (k + 1) * dt;
    }

    Instantiate instantiate = (Instantiate)sym(lib, "fmi2Instantiate");
    SetupExperiment setup = (SetupExperiment)sym(lib, "fmi2SetupExperiment");
    Plain enter = (Plain)sym(lib, "fmi2EnterInitializationMode");
    Plain exit_ = (Plain)sym(lib, "fmi2ExitInitializationMode");
    Plain terminate = (Plain)sym(lib, "fmi2Terminate");
    FreeInstance free_instance = (FreeInstance)sym(lib, "fmi2FreeInstance");
    RealIO set_real = (RealIO)sym(lib, "fmi2SetReal");
    RealIO get_real = (RealIO)sym(lib, "fmi2GetReal");
    DoStep do_step = (DoStep)sym(lib, "fmi2DoStep");
    StateIO get_state = (StateIO)sym(lib, "fmi2GetFMUstate");
    SetState set_state = (SetState)sym(lib, "fmi2SetFMUstate");
    StateIO free_state = (StateIO)sym(lib, "fmi2FreeFMUstate");

    fmi2CallbackFunctions cb = {logger, calloc, free, NULL, NULL};
    fmi2Component c = instantiate("c_master", fmi2CoSimulation, argv[4], argv[3], &cb, 0, 1);
    if (!c) {
        fprintf(stderr, "fmi2Instantiate failed\n");
        return 4;
    }
    CHECK(setup(c, 0, 0.0, 0.0, 0, 0.0));
    CHECK(enter(c));
    CHECK(exit_(c));

    fmi2Real y[64];
    fmi2FMUstate saved = NULL;
    int half = n / 2;
    CHECK(get_real(c, out_vr, n_out, y));
    printf("S 0 %.17g", 0.0);
    for (size_t j = 0; j < n_out; j++) printf(" %.17g", y[j]);
    printf("\n");
    for (int pass = 0; pass < 2; pass++) {
        int k0 = pass == 0 ? 0 : half;
        if (pass == 1) CHECK(set_state(c, saved));
        for (int k = k0; k < n; k++) {
            if (pass == 0 && k == half) CHECK(get_state(c, &saved));
            CHECK(set_real(c, &in_vr, 1, &u[k]));
            CHECK(do_step(c, t[k], h[k], 1));
            CHECK(get_real(c, out_vr, n_out, y));
            printf("%c %d %.17g", pass == 0 ? 'S' : 'R', k + 1, t[k + 1]);
            for (size_t j = 0; j < n_out; j++) printf(" %.17g", y[j]);
            printf("\n");
        }
    }
    CHECK(free_state(c, &saved));
    CHECK(terminate(c));
    free_instance(c);
    free(u);
    free(h);
    free(t);
    return 0;
}
