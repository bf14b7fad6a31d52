/* lv2host: a small LV2 test host for the liftmag plugin tests.
 *
 * It loads the shared object the way hosts do (dlopen with RTLD_LOCAL), and runs a list of
 * jobs on several threads, each job one plugin instance from instantiate() to cleanup(),
 * with block sizes drawn at random, optional state restore before and save after. The
 * library is closed and opened again between rounds, so instantiate/cleanup cycles also
 * cross a dlclose().
 *
 * Only what the LV2 core, URID and state specifications define is used; lilv is not
 * needed (its headers are not installed by lilv-utils).
 *
 * usage: lv2host PLUGIN.so BUNDLE_DIR JOBFILE THREADS ROUNDS
 *
 * One job per line of JOBFILE, whitespace separated:
 *   URI RATE IN_PORTS OUT_PORTS LATENCY_PORT CONTROLS IN_FILE OUT_FILE BLOCKS RESTORE SAVE
 * IN_PORTS / OUT_PORTS: comma-separated port indices; CONTROLS: "index=value,..." or "-";
 * IN_FILE: planar float32 (channel after channel), OUT_FILE is written the same way;
 * BLOCKS: "rN" random block sizes 1..8192 from seed N, or "fN" fixed blocks of N frames;
 * RESTORE / SAVE: state file to restore before activate() / save after the last run(),
 * or "-". Output files of round r > 0 get the suffix ".r<r>".
 * With LV2HOST_FEATURES=none in the environment the host offers no features at all (an
 * empty, NULL-terminated list, as LV2 core allows), to check what the plugin does then.
 * For every job it prints "job K round R latency L restore S save S instantiate_ms T
 * run_ms T worst_run_ms T", where S is the LV2_State_Status returned (-1: not asked for),
 * and the times are wall-clock milliseconds of instantiate(), of all run() calls, and of
 * the slowest run() call.
 */
#include <dlfcn.h>
#include <math.h>
#include <pthread.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

#include <lv2/core/lv2.h>
#include <lv2/state/state.h>
#include <lv2/urid/urid.h>

#define MAX_BLOCK 8192
#define MAX_PORTS 64
#define MAX_JOBS 64
#define MAX_PROPS 16

static double now_ms(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_MONOTONIC, &ts);
    return ts.tv_sec * 1e3 + ts.tv_nsec / 1e6;
}

static void die(const char *what)
{
    fprintf(stderr, "lv2host: %s\n", what);
    exit(2);
}

/* ----------------------------------------------------------------- URID map (thread-safe) */

static pthread_mutex_t map_lock = PTHREAD_MUTEX_INITIALIZER;
static char *uris[1024];
static uint32_t n_uris = 0;

static LV2_URID map_uri(LV2_URID_Map_Handle handle, const char *uri)
{
    (void)handle;
    pthread_mutex_lock(&map_lock);
    uint32_t id = 0;
    for (uint32_t i = 0; i < n_uris; ++i) {
        if (!strcmp(uris[i], uri)) {
            id = i + 1;
            break;
        }
    }
    if (!id && n_uris < 1024) {
        uris[n_uris] = strdup(uri);
        id = ++n_uris;
    }
    pthread_mutex_unlock(&map_lock);
    return id;
}

static const char *unmap_uri(LV2_URID_Unmap_Handle handle, LV2_URID urid)
{
    (void)handle;
    pthread_mutex_lock(&map_lock);
    const char *uri = (urid >= 1 && urid <= n_uris) ? uris[urid - 1] : NULL;
    pthread_mutex_unlock(&map_lock);
    return uri;
}

static LV2_URID_Map map = {NULL, map_uri};
static LV2_URID_Unmap unmap = {NULL, unmap_uri};
static const LV2_Feature map_feature = {LV2_URID__map, &map};
static const LV2_Feature unmap_feature = {LV2_URID__unmap, &unmap};
static const LV2_Feature *all_features[] = {&map_feature, &unmap_feature, NULL};
static const LV2_Feature *no_features[] = {NULL};
static const LV2_Feature *const *features = all_features;

/* ----------------------------------------------------------------- state store */

/* File format (ours): per property a line "KEY_URI TYPE_URI FLAGS SIZE\n" then SIZE bytes. */
typedef struct {
    char *key, *type;
    uint32_t flags;
    size_t size;
    void *value;
} Property;

typedef struct {
    Property props[MAX_PROPS];
    int n;
} Store;

static LV2_State_Status store_prop(LV2_State_Handle handle, uint32_t key, const void *value,
                                   size_t size, uint32_t type, uint32_t flags)
{
    Store *s = (Store *)handle;
    if (s->n >= MAX_PROPS)
        return LV2_STATE_ERR_NO_SPACE;
    /* LV2 state: the host must copy the value; the plugin's buffer is gone after save(). */
    Property *p = &s->props[s->n++];
    p->key = strdup(unmap_uri(NULL, key));
    p->type = strdup(unmap_uri(NULL, type));
    p->flags = flags;
    p->size = size;
    p->value = malloc(size ? size : 1);
    memcpy(p->value, value, size);
    return LV2_STATE_SUCCESS;
}

static const void *retrieve_prop(LV2_State_Handle handle, uint32_t key, size_t *size,
                                 uint32_t *type, uint32_t *flags)
{
    Store *s = (Store *)handle;
    const char *uri = unmap_uri(NULL, key);
    for (int i = 0; uri && i < s->n; ++i) {
        if (!strcmp(s->props[i].key, uri)) {
            if (size)
                *size = s->props[i].size;
            if (type)
                *type = map_uri(NULL, s->props[i].type);
            if (flags)
                *flags = s->props[i].flags;
            return s->props[i].value;
        }
    }
    return NULL;
}

static int write_store(const Store *s, const char *path)
{
    FILE *f = fopen(path, "wb");
    if (!f)
        return -1;
    for (int i = 0; i < s->n; ++i) {
        const Property *p = &s->props[i];
        fprintf(f, "%s %s %u %zu\n", p->key, p->type, p->flags, p->size);
        fwrite(p->value, 1, p->size, f);
    }
    return fclose(f);
}

static int read_store(Store *s, const char *path)
{
    FILE *f = fopen(path, "rb");
    if (!f)
        return -1;
    char key[1024], type[1024];
    unsigned flags;
    size_t size;
    s->n = 0;
    while (s->n < MAX_PROPS && fscanf(f, "%1023s %1023s %u %zu", key, type, &flags, &size) == 4) {
        fgetc(f); /* the newline */
        Property *p = &s->props[s->n++];
        p->key = strdup(key);
        p->type = strdup(type);
        p->flags = flags;
        p->size = size;
        p->value = malloc(size ? size : 1);
        if (fread(p->value, 1, size, f) != size) {
            fclose(f);
            return -1;
        }
    }
    fclose(f);
    return 0;
}

static void free_store(Store *s)
{
    for (int i = 0; i < s->n; ++i) {
        free(s->props[i].key);
        free(s->props[i].type);
        free(s->props[i].value);
    }
    s->n = 0;
}

/* ----------------------------------------------------------------- jobs */

typedef struct {
    char uri[256], in_file[1024], out_file[1024], restore[1024], save[1024], blocks[32];
    double rate;
    uint32_t in_ports[MAX_PORTS], out_ports[MAX_PORTS], n_in, n_out;
    uint32_t ctl_index[MAX_PORTS];
    float ctl_value[MAX_PORTS];
    uint32_t n_ctl;
    uint32_t latency_port;
} Job;

static Job jobs[MAX_JOBS];
static int n_jobs = 0;
static const char *bundle_dir;
static LV2_Descriptor_Function get_descriptor;
static int round_index;
static int next_job;
static pthread_mutex_t job_lock = PTHREAD_MUTEX_INITIALIZER;
static pthread_mutex_t out_lock = PTHREAD_MUTEX_INITIALIZER;

static uint32_t parse_list(const char *text, uint32_t *out)
{
    uint32_t n = 0;
    char buf[512];
    snprintf(buf, sizeof buf, "%s", text);
    for (char *save = NULL, *tok = strtok_r(buf, ",", &save); tok && n < MAX_PORTS;
         tok = strtok_r(NULL, ",", &save))
        out[n++] = (uint32_t)strtoul(tok, NULL, 10);
    return n;
}

static void parse_controls(Job *job, const char *text)
{
    job->n_ctl = 0;
    if (!strcmp(text, "-"))
        return;
    char buf[1024];
    snprintf(buf, sizeof buf, "%s", text);
    for (char *save = NULL, *tok = strtok_r(buf, ",", &save); tok && job->n_ctl < MAX_PORTS;
         tok = strtok_r(NULL, ",", &save)) {
        char *eq = strchr(tok, '=');
        if (!eq)
            die("bad control (want index=value)");
        *eq = '\0';
        job->ctl_index[job->n_ctl] = (uint32_t)strtoul(tok, NULL, 10);
        job->ctl_value[job->n_ctl] = strtof(eq + 1, NULL);
        job->n_ctl++;
    }
}

static float *read_planar(const char *path, uint32_t n_channels, size_t *n_frames)
{
    FILE *f = fopen(path, "rb");
    if (!f)
        die("cannot open an input file");
    fseek(f, 0, SEEK_END);
    long bytes = ftell(f);
    fseek(f, 0, SEEK_SET);
    *n_frames = (size_t)bytes / (sizeof(float) * n_channels);
    float *data = malloc((size_t)bytes + sizeof(float));
    if (fread(data, 1, (size_t)bytes, f) != (size_t)bytes)
        die("short read");
    fclose(f);
    return data;
}

static uint64_t next_random(uint64_t *state)
{
    /* xorshift64*: reproducible block sizes from the job's seed. */
    *state ^= *state >> 12;
    *state ^= *state << 25;
    *state ^= *state >> 27;
    return *state * 2685821657736338717ull;
}

static const LV2_Descriptor *find_descriptor(const char *uri)
{
    for (uint32_t i = 0;; ++i) {
        const LV2_Descriptor *d = get_descriptor(i);
        if (!d)
            return NULL;
        if (!strcmp(d->URI, uri))
            return d;
    }
}

static void run_job(int k)
{
    const Job *job = &jobs[k];
    const LV2_Descriptor *desc = find_descriptor(job->uri);
    if (!desc)
        die("plugin URI not in the library");

    size_t n_frames;
    float *input = read_planar(job->in_file, job->n_in, &n_frames);
    float *output = calloc(job->n_out * n_frames + 1, sizeof(float));
    float (*in_buf)[MAX_BLOCK] = calloc(job->n_in, sizeof *in_buf);
    float (*out_buf)[MAX_BLOCK] = calloc(job->n_out, sizeof *out_buf);
    float controls[MAX_PORTS];
    float latency = -1.0f;

    const double t_inst = now_ms();
    LV2_Handle inst = desc->instantiate(desc, job->rate, bundle_dir, features);
    const double inst_ms = now_ms() - t_inst;
    if (!inst)
        die("instantiate returned NULL");
    for (uint32_t c = 0; c < job->n_in; ++c)
        desc->connect_port(inst, job->in_ports[c], in_buf[c]);
    for (uint32_t c = 0; c < job->n_out; ++c)
        desc->connect_port(inst, job->out_ports[c], out_buf[c]);
    for (uint32_t i = 0; i < job->n_ctl; ++i) {
        controls[i] = job->ctl_value[i];
        desc->connect_port(inst, job->ctl_index[i], &controls[i]);
    }
    desc->connect_port(inst, job->latency_port, &latency);

    const LV2_State_Interface *state =
        (const LV2_State_Interface *)desc->extension_data(LV2_STATE__interface);
    int restore_status = -1, save_status = -1;
    if (strcmp(job->restore, "-")) {
        Store store = {0};
        if (!state || read_store(&store, job->restore) != 0)
            die("cannot read a state file");
        restore_status = state->restore(inst, retrieve_prop, &store, 0, features);
        free_store(&store);
    }

    desc->activate(inst);
    uint64_t seed = 0;
    uint32_t fixed = 0;
    if (job->blocks[0] == 'r')
        seed = strtoull(job->blocks + 1, NULL, 10) * 2654435761ull + 1;
    else
        fixed = (uint32_t)strtoul(job->blocks + 1, NULL, 10);
    if (!seed && (fixed < 1 || fixed > MAX_BLOCK))
        die("bad block size");
    size_t pos = 0;
    double worst_ms = 0.0, run_ms = 0.0;
    while (pos < n_frames) {
        uint32_t n = seed ? (uint32_t)(next_random(&seed) % MAX_BLOCK) + 1 : fixed;
        if (n > n_frames - pos)
            n = (uint32_t)(n_frames - pos);
        for (uint32_t c = 0; c < job->n_in; ++c)
            memcpy(in_buf[c], input + c * n_frames + pos, n * sizeof(float));
        const double t_run = now_ms();
        desc->run(inst, n);
        const double took = now_ms() - t_run;
        run_ms += took;
        if (took > worst_ms)
            worst_ms = took;
        for (uint32_t c = 0; c < job->n_out; ++c)
            memcpy(output + c * n_frames + pos, out_buf[c], n * sizeof(float));
        pos += n;
    }
    if (strcmp(job->save, "-")) {
        Store store = {0};
        if (!state)
            die("no state interface");
        save_status = state->save(inst, store_prop, &store, 0, features);
        if (save_status == LV2_STATE_SUCCESS && write_store(&store, job->save) != 0)
            die("cannot write a state file");
        free_store(&store);
    }
    desc->deactivate(inst);
    desc->cleanup(inst);

    char path[1100];
    if (round_index == 0)
        snprintf(path, sizeof path, "%s", job->out_file);
    else
        snprintf(path, sizeof path, "%s.r%d", job->out_file, round_index);
    FILE *f = fopen(path, "wb");
    if (!f || fwrite(output, sizeof(float), job->n_out * n_frames, f) != job->n_out * n_frames)
        die("cannot write an output file");
    fclose(f);
    pthread_mutex_lock(&out_lock);
    printf("job %d round %d latency %.0f restore %d save %d instantiate_ms %.3f "
           "run_ms %.3f worst_run_ms %.3f\n", k, round_index, latency, restore_status,
           save_status, inst_ms, run_ms, worst_ms);
    fflush(stdout);
    pthread_mutex_unlock(&out_lock);
    free(input);
    free(output);
    free(in_buf);
    free(out_buf);
}

static void *worker(void *arg)
{
    (void)arg;
    for (;;) {
        pthread_mutex_lock(&job_lock);
        int k = next_job < n_jobs ? next_job++ : -1;
        pthread_mutex_unlock(&job_lock);
        if (k < 0)
            return NULL;
        run_job(k);
    }
}

int main(int argc, char **argv)
{
    if (argc != 6) {
        fprintf(stderr, "usage: lv2host PLUGIN.so BUNDLE_DIR JOBFILE THREADS ROUNDS\n");
        return 2;
    }
    bundle_dir = argv[2];
    const char *offered = getenv("LV2HOST_FEATURES");
    if (offered && !strcmp(offered, "none"))
        features = no_features;
    int n_threads = atoi(argv[4]), n_rounds = atoi(argv[5]);
    FILE *f = fopen(argv[3], "r");
    if (!f)
        die("cannot open the job file");
    char ins[512], outs[512], ctls[1024];
    Job *j = &jobs[0];
    while (n_jobs < MAX_JOBS &&
           fscanf(f, "%255s %lf %511s %511s %u %1023s %1023s %1023s %31s %1023s %1023s",
                  j->uri, &j->rate, ins, outs, &j->latency_port, ctls, j->in_file,
                  j->out_file, j->blocks, j->restore, j->save) == 11) {
        j->n_in = parse_list(ins, j->in_ports);
        j->n_out = parse_list(outs, j->out_ports);
        parse_controls(j, ctls);
        j = &jobs[++n_jobs];
    }
    fclose(f);

    for (round_index = 0; round_index < n_rounds; ++round_index) {
        /* RTLD_LOCAL like real hosts: the plugin must cope with private symbols. */
        void *lib = dlopen(argv[1], RTLD_NOW | RTLD_LOCAL);
        if (!lib) {
            fprintf(stderr, "lv2host: %s\n", dlerror());
            return 2;
        }
        get_descriptor = (LV2_Descriptor_Function)dlsym(lib, "lv2_descriptor");
        if (!get_descriptor)
            die("no lv2_descriptor symbol");
        next_job = 0;
        pthread_t threads[64];
        int n = n_threads < 1 ? 1 : (n_threads > 64 ? 64 : n_threads);
        for (int t = 0; t < n; ++t)
            pthread_create(&threads[t], NULL, worker, NULL);
        for (int t = 0; t < n; ++t)
            pthread_join(threads[t], NULL);
        /* Hosts unload a plugin library when its last instance is gone. */
        dlclose(lib);
    }
    return 0;
}
