/* liftmag LV2 shim: the C side of the plugin.
 *
 * cffi compiles this file in embedding mode (see build_shim.py beside it). The values baked
 * in at build time and the port indices come from the generated header liftmag_ports.h,
 * so the file is complete on its own: a test compiles it alone with -Wall -Wextra -Werror.
 * It holds the static LV2 descriptors, gathers audio into fixed blocks, and calls the
 * Python bridge (bridge.py, copied into the bundle as liftmag_lv2_bridge.py) through the
 * extern "Python" functions declared below, one call per block.
 *
 * Whatever goes wrong on the Python side (no interpreter, a moved environment, an
 * exception), the host gets the dry input delayed by the reported latency, and a line in
 * the log; instantiate() only returns NULL when memory runs out.
 *
 * Not hard real-time: run() calls Python, which allocates and takes the GIL. Meant for
 * offline (render) use.
 */
/* Python.h first, as the Python C API asks (cffi has already included it when it compiles
   this file, and the include guard makes the second time a no-op). */
#include <Python.h>

#include <dlfcn.h>
#include <errno.h>
#include <math.h>
#include <pthread.h>
#include <pwd.h>
#include <stdarg.h>
#include <stdbool.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/stat.h>
#include <sys/types.h>
#include <time.h>
#include <unistd.h>

#include <lv2/atom/atom.h>
#include <lv2/core/lv2.h>
#include <lv2/core/lv2_util.h>
#include <lv2/state/state.h>
#include <lv2/urid/urid.h>

#include "liftmag_ports.h"

#ifdef _CFFI_USE_EMBEDDING
/* cffi pastes this file after its own prologue and generates the bodies of the bridge
   callbacks further down; the functions the bridge calls are static like them. */
#define LIFTMAG_BRIDGE_API static
#else
/* Compiled alone (a syntax and warning check): what cffi would generate is external. */
#define LIFTMAG_BRIDGE_API
int cffi_start_python(void);
#endif

/* Implemented in the bridge (cffi generates the C bodies). */
LIFTMAG_BRIDGE_API int64_t liftmag_py_instantiate(double rate, uint32_t n_channels,
                                                  uint32_t block, int32_t *engine_latency);
LIFTMAG_BRIDGE_API int liftmag_py_process(int64_t handle, const float *in, float *out,
                                          uint32_t n_frames, const float *controls,
                                          uint32_t n_controls);
LIFTMAG_BRIDGE_API int liftmag_py_activate(int64_t handle);
LIFTMAG_BRIDGE_API void liftmag_py_cleanup(int64_t handle);
LIFTMAG_BRIDGE_API int liftmag_py_save(int64_t handle, void *sink);
LIFTMAG_BRIDGE_API int liftmag_py_restore(int64_t handle, const char *data, size_t size);

/* Called by the bridge (declared in build_shim.CDEF). */
LIFTMAG_BRIDGE_API void liftmag_log(const char *message);
LIFTMAG_BRIDGE_API int liftmag_state_store(void *sink, const char *data, size_t size);
LIFTMAG_BRIDGE_API const char *liftmag_bundle_dir(void);

#define LIFTMAG_MAX_CHANNELS 16
/* Engine latencies beyond this (samples) are refused as implausible (83 s at 192 kHz). The
   bound leaves room for a look-ahead of several seconds at any rate, and keeps the reported
   latency (this plus the block) a whole number that the float latency port holds exactly
   (float32 holds every integer up to 2^24 = 16777216). */
#define LIFTMAG_MAX_ENGINE_LATENCY 16000000

/* ---------------------------------------------------------------- logging */

static pthread_mutex_t g_log_lock = PTHREAD_MUTEX_INITIALIZER;

static int make_dirs(char *path)
{
    /* mkdir -p: create each missing component in turn. */
    for (char *p = path + 1; *p; ++p) {
        if (*p == '/') {
            *p = '\0';
            if (mkdir(path, 0755) != 0 && errno != EEXIST) {
                *p = '/';
                return -1;
            }
            *p = '/';
        }
    }
    return (mkdir(path, 0755) == 0 || errno == EEXIST) ? 0 : -1;
}

static int log_dir(char *out, size_t size)
{
    /* $XDG_STATE_HOME/liftmag, else ~/.cache/liftmag; HOME may be unset (env -i). */
    const char *state = getenv("XDG_STATE_HOME");
    if (state && state[0] == '/')
        return snprintf(out, size, "%s/liftmag", state) < (int)size ? 0 : -1;
    const char *home = getenv("HOME");
    if (!home || home[0] != '/') {
        struct passwd pw, *found = NULL;
        char buf[4096];
        if (getpwuid_r(getuid(), &pw, buf, sizeof buf, &found) != 0 || !found)
            return -1;
        return snprintf(out, size, "%s/.cache/liftmag", found->pw_dir) < (int)size ? 0 : -1;
    }
    return snprintf(out, size, "%s/.cache/liftmag", home) < (int)size ? 0 : -1;
}

/* One line to stderr and to the log file. Exposed to the bridge through cffi. */
LIFTMAG_BRIDGE_API void liftmag_log(const char *message)
{
    char dir[4096], path[4200], stamp[64];
    time_t now = time(NULL);
    struct tm tm;
    gmtime_r(&now, &tm);
    strftime(stamp, sizeof stamp, "%Y-%m-%dT%H:%M:%SZ", &tm);

    pthread_mutex_lock(&g_log_lock);
    fprintf(stderr, "liftmag-lv2: %s\n", message);
    if (log_dir(dir, sizeof dir) == 0 && make_dirs(dir) == 0) {
        snprintf(path, sizeof path, "%s/lv2-plugin.log", dir);
        FILE *f = fopen(path, "a");
        if (f) {
            fprintf(f, "%s [%ld] %s\n", stamp, (long)getpid(), message);
            fclose(f);
        }
    }
    pthread_mutex_unlock(&g_log_lock);
}

static void liftmag_logf(const char *fmt, ...)
{
    char message[2048];
    va_list args;
    va_start(args, fmt);
    vsnprintf(message, sizeof message, fmt, args);
    va_end(args);
    liftmag_log(message);
}

/* ---------------------------------------------------------------- Python start-up */

static pthread_mutex_t g_start_lock = PTHREAD_MUTEX_INITIALIZER;
static int g_python_state = 0; /* 0 not tried, 1 running, -1 unavailable */
static char g_bundle_dir[4096] = "";

LV2_SYMBOL_EXPORT const LV2_Descriptor *lv2_descriptor(uint32_t index);

/* Directory of this shared object (the bundle), for the bridge's sys.path. */
LIFTMAG_BRIDGE_API const char *liftmag_bundle_dir(void)
{
    return g_bundle_dir;
}

static int venv_matches(void)
{
    /* The interpreter this object links against must be the one the environment was made
       with, or its standard library and site-packages will not fit. */
    char dir[4096], lib[4200];
    struct stat st;
    snprintf(dir, sizeof dir, "%s", LIFTMAG_VENV_PYTHON);
    char *slash = strrchr(dir, '/');
    if (!slash)
        return 0;
    *slash = '\0';                 /* .../venv/bin */
    slash = strrchr(dir, '/');
    if (!slash)
        return 0;
    *slash = '\0';                 /* .../venv */
    snprintf(lib, sizeof lib, "%s/lib/python%d.%d", dir, PY_MAJOR_VERSION, PY_MINOR_VERSION);
    return stat(lib, &st) == 0 && S_ISDIR(st.st_mode);
}

static int start_python_locked(void)
{
    Dl_info info;

    if (dladdr((void *)&lv2_descriptor, &info) && info.dli_fname) {
        char real[4096];
        const char *path = realpath(info.dli_fname, real) ? real : info.dli_fname;
        snprintf(g_bundle_dir, sizeof g_bundle_dir, "%s", path);
        char *slash = strrchr(g_bundle_dir, '/');
        if (slash)
            *slash = '\0';
        /* Python will keep pointers into this object (module, callbacks, types), so it must
           stay mapped even when the host closes it after the last instance. */
        if (!dlopen(info.dli_fname, RTLD_NOW | RTLD_NOLOAD | RTLD_NODELETE))
            liftmag_logf("could not pin the plugin in memory: %s", dlerror());
    }

    /* The host opened us with RTLD_LOCAL, so libpython's symbols are invisible to the
       extension modules Python loads later (_cffi_backend, numpy): make them global. */
    if (dladdr((void *)&Py_IsInitialized, &info) && info.dli_fname) {
        if (!dlopen(info.dli_fname, RTLD_NOW | RTLD_NOLOAD | RTLD_GLOBAL))
            liftmag_logf("could not make %s global: %s", info.dli_fname, dlerror());
    }

    if (Py_IsInitialized()) {
        liftmag_log("using the Python interpreter already running in this process");
    } else {
        if (access(LIFTMAG_VENV_PYTHON, X_OK) != 0) {
            liftmag_logf("the Python environment of this plugin (%s) is missing or moved; "
                         "audio passes through unprocessed. Rebuild and reinstall from the "
                         "environment to use: liftmag plugin install --rebuild",
                         LIFTMAG_VENV_PYTHON);
            return 0;
        }
        if (!venv_matches()) {
            liftmag_logf("the Python environment %s was not made with Python %d.%d, which "
                         "this plugin was built for; audio passes through unprocessed. "
                         "Rebuild and reinstall: liftmag plugin install --rebuild",
                         LIFTMAG_VENV_PYTHON,
                         PY_MAJOR_VERSION, PY_MINOR_VERSION);
            return 0;
        }
        /* Isolated: the host's environment (PYTHONHOME, PYTHONPATH, ...) must not choose
           which Python starts; the build-time environment's interpreter does. */
        PyConfig config;
        PyConfig_InitIsolatedConfig(&config);
        config.install_signal_handlers = 0; /* the host owns the signals */
        config.parse_argv = 0;
        PyStatus status = PyConfig_SetBytesString(&config, &config.program_name,
                                                  LIFTMAG_VENV_PYTHON);
        if (!PyStatus_Exception(status))
            status = PyConfig_SetBytesString(&config, &config.executable, LIFTMAG_VENV_PYTHON);
        if (!PyStatus_Exception(status))
            status = Py_InitializeFromConfig(&config);
        PyConfig_Clear(&config);
        if (PyStatus_Exception(status)) {
            liftmag_logf("Python did not start (%s%s%s); audio passes through unprocessed",
                         status.func ? status.func : "", status.func ? ": " : "",
                         status.err_msg ? status.err_msg : "unknown error");
            return 0;
        }
        /* Py_InitializeFromConfig leaves this thread holding the GIL; every later call
           (from any host thread) takes it through PyGILState_Ensure in cffi. */
        PyEval_SaveThread();
    }

    /* Python is running, so cffi skips its own start-up and only sets up this module and
       runs the init code, which imports the bridge. */
    if (cffi_start_python() != 0) {
        liftmag_log("the Python bridge did not start (details above on stderr); audio "
                    "passes through unprocessed");
        return 0;
    }
    return 1;
}

static int liftmag_start_python(void)
{
    pthread_mutex_lock(&g_start_lock);
    if (g_python_state == 0)
        g_python_state = start_python_locked() ? 1 : -1;
    int ok = g_python_state == 1;
    pthread_mutex_unlock(&g_start_lock);
    return ok;
}

/* ---------------------------------------------------------------- the plugin */

/* Where one plugin's ports are (from liftmag_ports.h, which has them from the TTL). */
typedef struct {
    uint32_t n_channels;
    uint32_t first_input;
    uint32_t first_output;
    uint32_t first_control;
    uint32_t latency;
} PortLayout;

typedef struct {
    const PortLayout *layout;
    const float *in[LIFTMAG_MAX_CHANNELS];
    float *out[LIFTMAG_MAX_CHANNELS];
    const float *controls[LIFTMAG_N_CONTROLS];
    float *latency_port;

    uint32_t n_channels;
    int64_t handle;          /* bridge instance; 0: run dry */
    uint32_t engine_latency; /* samples, fixed at instantiate */
    uint32_t fill;           /* frames gathered in the current block */
    float *in_block;         /* n_channels x LIFTMAG_BLOCK, planar */
    float *out_block;        /* output of the previous block, played during this one */
    float *dry;              /* n_channels x (engine_latency + LIFTMAG_BLOCK) delay line */
    float control_values[LIFTMAG_N_CONTROLS];

    LV2_URID_Map *map;
    LV2_URID urid_model;
    LV2_URID urid_chunk;
} Instance;

static const PortLayout *layout_of(const LV2_Descriptor *descriptor);

static LV2_Handle instantiate(const LV2_Descriptor *descriptor, double rate,
                              const char *bundle_path, const LV2_Feature *const *features)
{
    (void)bundle_path;
    Instance *self = (Instance *)calloc(1, sizeof(Instance));
    if (!self)
        return NULL; /* out of memory: nothing else can be done */
    self->layout = layout_of(descriptor);
    self->n_channels = self->layout->n_channels;

    /* Every feature is optional (the TTL lists urid:map as lv2:optionalFeature): without a
       URID map the plugin runs, and only state save and restore report the missing
       feature. A feature made required here must also move to lv2:requiredFeature. */
    const char *missing = lv2_features_query(features, LV2_URID__map, &self->map, false, NULL);
    if (missing) {
        liftmag_logf("the host does not provide %s, which this plugin requires", missing);
        free(self);
        return NULL;
    }
    if (self->map) {
        self->urid_model = self->map->map(self->map->handle, LIFTMAG_STATE_KEY_URI);
        self->urid_chunk = self->map->map(self->map->handle, LV2_ATOM__Chunk);
    }

    int32_t latency = 0;
    if (liftmag_start_python()) {
        self->handle = liftmag_py_instantiate(rate, self->n_channels, LIFTMAG_BLOCK, &latency);
        if (self->handle <= 0) {
            self->handle = 0; /* the bridge logged why */
            latency = 0;
        } else if (latency < 0 || latency > LIFTMAG_MAX_ENGINE_LATENCY) {
            liftmag_logf("engine reported an implausible latency (%d samples); audio passes "
                         "through unprocessed", (int)latency);
            liftmag_py_cleanup(self->handle);
            self->handle = 0;
            latency = 0;
        }
    }
    self->engine_latency = (uint32_t)latency;

    const size_t nc = self->n_channels;
    self->in_block = (float *)calloc(nc * LIFTMAG_BLOCK, sizeof(float));
    self->out_block = (float *)calloc(nc * LIFTMAG_BLOCK, sizeof(float));
    self->dry = (float *)calloc(nc * (self->engine_latency + LIFTMAG_BLOCK), sizeof(float));
    if (!self->in_block || !self->out_block || !self->dry) {
        if (self->handle)
            liftmag_py_cleanup(self->handle);
        free(self->in_block);
        free(self->out_block);
        free(self->dry);
        free(self);
        return NULL;
    }
    for (uint32_t k = 0; k < LIFTMAG_N_CONTROLS; ++k)
        self->control_values[k] = NAN;
    return (LV2_Handle)self;
}

static void connect_port(LV2_Handle instance, uint32_t port, void *data)
{
    Instance *self = (Instance *)instance;
    const PortLayout *at = self->layout;
    const uint32_t nc = self->n_channels;
    /* Unsigned differences: a port below the range wraps to a large number. */
    if (port - at->first_input < nc)
        self->in[port - at->first_input] = (const float *)data;
    else if (port - at->first_output < nc)
        self->out[port - at->first_output] = (float *)data;
    else if (port - at->first_control < LIFTMAG_N_CONTROLS)
        self->controls[port - at->first_control] = (const float *)data;
    else if (port == at->latency)
        self->latency_port = (float *)data;
}

static void activate(LV2_Handle instance)
{
    Instance *self = (Instance *)instance;
    const size_t nc = self->n_channels;
    self->fill = 0;
    memset(self->in_block, 0, nc * LIFTMAG_BLOCK * sizeof(float));
    memset(self->out_block, 0, nc * LIFTMAG_BLOCK * sizeof(float));
    memset(self->dry, 0, nc * (self->engine_latency + LIFTMAG_BLOCK) * sizeof(float));
    if (self->handle && liftmag_py_activate(self->handle) != 1)
        self->handle = 0; /* the bridge logged why; run dry from now on */
}

static void process_block(Instance *self)
{
    const uint32_t nc = self->n_channels;
    const uint32_t lat = self->engine_latency;
    const uint32_t span = lat + LIFTMAG_BLOCK;

    for (uint32_t c = 0; c < nc; ++c)
        memcpy(self->dry + (size_t)c * span + lat, self->in_block + (size_t)c * LIFTMAG_BLOCK,
               LIFTMAG_BLOCK * sizeof(float));

    int ok = 0;
    if (self->handle) {
        for (uint32_t k = 0; k < LIFTMAG_N_CONTROLS; ++k)
            self->control_values[k] = self->controls[k] ? *self->controls[k] : NAN;
        ok = liftmag_py_process(self->handle, self->in_block, self->out_block, LIFTMAG_BLOCK,
                                self->control_values, LIFTMAG_N_CONTROLS) == 1;
    }
    if (!ok) {
        /* Dry signal, delayed by the engine latency so it lines up with the wet signal;
           non-finite input must not reach the host either way. */
        for (uint32_t c = 0; c < nc; ++c) {
            const float *src = self->dry + (size_t)c * span;
            float *dst = self->out_block + (size_t)c * LIFTMAG_BLOCK;
            for (uint32_t i = 0; i < LIFTMAG_BLOCK; ++i)
                dst[i] = isfinite(src[i]) ? src[i] : 0.0f;
        }
    }
    for (uint32_t c = 0; c < nc; ++c)
        memmove(self->dry + (size_t)c * span, self->dry + (size_t)c * span + LIFTMAG_BLOCK,
                lat * sizeof(float));
}

static void run(LV2_Handle instance, uint32_t n_samples)
{
    Instance *self = (Instance *)instance;
    const uint32_t nc = self->n_channels;
    if (self->latency_port)
        *self->latency_port = (float)(self->engine_latency + LIFTMAG_BLOCK);

    /* Blocks of LIFTMAG_BLOCK frames whatever the host's block size: the output of block k
       plays while block k + 1 gathers, which adds LIFTMAG_BLOCK to the latency. */
    uint32_t done = 0;
    while (done < n_samples) {
        uint32_t m = LIFTMAG_BLOCK - self->fill;
        if (m > n_samples - done)
            m = n_samples - done;
        /* All inputs are read before any output is written: hosts may process in place. */
        for (uint32_t c = 0; c < nc; ++c) {
            float *dst = self->in_block + (size_t)c * LIFTMAG_BLOCK + self->fill;
            if (self->in[c])
                memcpy(dst, self->in[c] + done, m * sizeof(float));
            else
                memset(dst, 0, m * sizeof(float));
        }
        for (uint32_t c = 0; c < nc; ++c) {
            if (self->out[c])
                memcpy(self->out[c] + done,
                       self->out_block + (size_t)c * LIFTMAG_BLOCK + self->fill,
                       m * sizeof(float));
        }
        self->fill += m;
        done += m;
        if (self->fill == LIFTMAG_BLOCK) {
            process_block(self);
            self->fill = 0;
        }
    }
}

static void deactivate(LV2_Handle instance)
{
    (void)instance;
}

static void cleanup(LV2_Handle instance)
{
    Instance *self = (Instance *)instance;
    if (self->handle)
        liftmag_py_cleanup(self->handle);
    free(self->in_block);
    free(self->out_block);
    free(self->dry);
    free(self);
}

/* ---------------------------------------------------------------- LV2 state */

typedef struct {
    LV2_State_Store_Function store;
    LV2_State_Handle handle;
    LV2_URID key;
    LV2_URID type;
    LV2_State_Status status;
} StoreSink;

/* Called by the bridge during liftmag_py_save() with the noise model's bytes. */
LIFTMAG_BRIDGE_API int liftmag_state_store(void *sink_ptr, const char *data, size_t size)
{
    StoreSink *sink = (StoreSink *)sink_ptr;
    /* The chunk is an .npz archive: plain bytes that mean the same on any machine. */
    sink->status = sink->store(sink->handle, sink->key, data, size, sink->type,
                               LV2_STATE_IS_POD | LV2_STATE_IS_PORTABLE);
    return sink->status == LV2_STATE_SUCCESS;
}

static LV2_State_Status save(LV2_Handle instance, LV2_State_Store_Function store,
                             LV2_State_Handle handle, uint32_t flags,
                             const LV2_Feature *const *features)
{
    (void)flags;
    (void)features;
    Instance *self = (Instance *)instance;
    if (!self->map)
        return LV2_STATE_ERR_NO_FEATURE;
    if (!self->handle)
        return LV2_STATE_SUCCESS; /* running dry: there is no model to keep */
    StoreSink sink = {store, handle, self->urid_model, self->urid_chunk, LV2_STATE_ERR_UNKNOWN};
    /* sink.status stays ERR_UNKNOWN unless the bridge reached the host's store(), in which
       case it is store()'s own answer. */
    if (liftmag_py_save(self->handle, &sink) != 1 && sink.status == LV2_STATE_SUCCESS)
        return LV2_STATE_ERR_UNKNOWN;
    return sink.status;
}

static LV2_State_Status restore(LV2_Handle instance, LV2_State_Retrieve_Function retrieve,
                                LV2_State_Handle handle, uint32_t flags,
                                const LV2_Feature *const *features)
{
    (void)flags;
    (void)features;
    Instance *self = (Instance *)instance;
    if (!self->map)
        return LV2_STATE_ERR_NO_FEATURE;
    size_t size = 0;
    uint32_t type = 0, value_flags = 0;
    const void *data = retrieve(handle, self->urid_model, &size, &type, &value_flags);
    if (data && type != self->urid_chunk)
        return LV2_STATE_ERR_BAD_TYPE;
    if (!self->handle)
        return data ? LV2_STATE_ERR_UNKNOWN : LV2_STATE_SUCCESS;
    /* No stored model means "back to the default" (LV2 state: restore with an empty map). */
    return liftmag_py_restore(self->handle, (const char *)data, data ? size : 0) == 1
               ? LV2_STATE_SUCCESS
               : LV2_STATE_ERR_UNKNOWN;
}

static const LV2_State_Interface state_interface = {save, restore};

static const void *extension_data(const char *uri)
{
    if (!strcmp(uri, LV2_STATE__interface))
        return &state_interface;
    return NULL;
}

/* ---------------------------------------------------------------- descriptors */

static const LV2_Descriptor descriptors[] = {
#define LIFTMAG_PLUGIN(uri, channels, first_input, first_output, first_control, latency) \
    {uri, instantiate, connect_port, activate, run, deactivate, cleanup, extension_data},
    LIFTMAG_PLUGINS
#undef LIFTMAG_PLUGIN
};

static const PortLayout layouts[] = {
#define LIFTMAG_PLUGIN(uri, channels, first_input, first_output, first_control, latency) \
    {channels, first_input, first_output, first_control, latency},
    LIFTMAG_PLUGINS
#undef LIFTMAG_PLUGIN
};

static const PortLayout *layout_of(const LV2_Descriptor *descriptor)
{
    return &layouts[descriptor - descriptors];
}

LV2_SYMBOL_EXPORT const LV2_Descriptor *lv2_descriptor(uint32_t index)
{
    return index < sizeof descriptors / sizeof descriptors[0] ? &descriptors[index] : NULL;
}
