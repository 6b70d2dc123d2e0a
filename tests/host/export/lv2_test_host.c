/*
 * lv2_test_host.c -- a minimal LV2 host on lilv, for the export tests.
 *
 * Loads the world from LV2_PATH, instantiates the plugin URI at RATE Hz
 * with urid:map as its only feature, and plays a script: each line is
 *   run N                  one run() of N frames (any length)
 *   midi T B0 B1 B2        a 3-byte MIDI message at absolute frame T
 *   port T SYMBOL VALUE    a control port value, set before the run that starts at or after T
 * Audio (float32, native order) goes to OUT.  Options: --save FILE writes
 * the plugin's LV2 state (its state interface only, no port values) as
 * Turtle after the script; --restore FILE restores such a state right after
 * instantiate.  Exit 0 on success, 3 when instantiate returns NULL (a
 * refused rate), 1 on any other failure, with one line on stderr.
 */
#define _POSIX_C_SOURCE 200809L
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include <lilv/lilv.h>
#include <lv2/atom/atom.h>
#include <lv2/atom/util.h>
#include <lv2/midi/midi.h>
#include <lv2/state/state.h>
#include <lv2/urid/urid.h>

#define MAX_URIDS 1024
#define MAX_LINES 100000
#define SEQ_BYTES 65536

static char *uris[MAX_URIDS];
static uint32_t n_uris;

static LV2_URID map_uri(LV2_URID_Map_Handle h, const char *uri) {
    uint32_t i;
    (void)h;
    for (i = 0; i < n_uris; ++i)
        if (!strcmp(uris[i], uri)) return i + 1;
    if (n_uris == MAX_URIDS) return 0;
    uris[n_uris] = strdup(uri);
    return ++n_uris;
}

static const char *unmap_uri(LV2_URID_Unmap_Handle h, LV2_URID u) {
    (void)h;
    return (u >= 1 && u <= n_uris) ? uris[u - 1] : NULL;
}

typedef struct line { char kind; long t; int b[3]; char sym[64]; float value; long n; } line;

static char *read_all(const char *path) {
    FILE *f = fopen(path, "rb");
    long n;
    char *s;
    if (!f) return NULL;
    fseek(f, 0, SEEK_END);
    n = ftell(f);
    fseek(f, 0, SEEK_SET);
    s = calloc(1, (size_t)n + 1);
    if (s && fread(s, 1, (size_t)n, f) != (size_t)n) { free(s); s = NULL; }
    fclose(f);
    return s;
}

static int fail(const char *msg) { fprintf(stderr, "lv2_test_host: %s\n", msg); return 1; }

int main(int argc, char **argv) {
    const char *uri = NULL, *script = NULL, *out_path = NULL, *save = NULL, *restore = NULL;
    double rate = 48000.0;
    int i;
    for (i = 1; i + 1 < argc; i += 2) {
        if (!strcmp(argv[i], "--uri")) uri = argv[i + 1];
        else if (!strcmp(argv[i], "--rate")) rate = atof(argv[i + 1]);
        else if (!strcmp(argv[i], "--script")) script = argv[i + 1];
        else if (!strcmp(argv[i], "--out")) out_path = argv[i + 1];
        else if (!strcmp(argv[i], "--save")) save = argv[i + 1];
        else if (!strcmp(argv[i], "--restore")) restore = argv[i + 1];
        else return fail("unknown option");
    }
    if (!uri || !script || !out_path) return fail("need --uri, --script and --out");

    LilvWorld *world = lilv_world_new();
    lilv_world_load_all(world);
    LilvNode *uri_node = lilv_new_uri(world, uri);
    const LilvPlugin *plugin = lilv_plugins_get_by_uri(lilv_world_get_all_plugins(world), uri_node);
    if (!plugin) return fail("plugin not found on LV2_PATH");

    LV2_URID_Map map = {NULL, map_uri};
    LV2_URID_Unmap unmap = {NULL, unmap_uri};
    LV2_Feature map_f = {LV2_URID__map, &map};
    LV2_Feature unmap_f = {LV2_URID__unmap, &unmap};
    const LV2_Feature *features[] = {&map_f, NULL};           /* the plugin's only required feature */
    const LV2_Feature *state_features[] = {&map_f, &unmap_f, NULL};

    LilvInstance *inst = lilv_plugin_instantiate(plugin, rate, features);
    if (!inst) {
        fprintf(stderr, "lv2_test_host: instantiate refused %g Hz\n", rate);
        return 3;
    }
    if (restore) {
        char *text = read_all(restore);
        LilvState *st;
        if (!text) return fail("cannot read the state file");
        st = lilv_state_new_from_string(world, &map, text);
        if (!st) return fail("cannot parse the state file");
        lilv_state_restore(st, inst, NULL, NULL, 0, state_features);
        lilv_state_free(st);
        free(text);
    }

    uint32_t n_ports = lilv_plugin_get_num_ports(plugin);
    float *controls = calloc(n_ports, sizeof(float));
    float *mins = calloc(n_ports, sizeof(float)), *maxs = calloc(n_ports, sizeof(float));
    lilv_plugin_get_port_ranges_float(plugin, mins, maxs, controls);   /* controls = defaults */
    LilvNode *sym_midi = lilv_new_string(world, "midi_in"), *sym_out = lilv_new_string(world, "out");
    const LilvPort *pm = lilv_plugin_get_port_by_symbol(plugin, sym_midi);
    const LilvPort *po = lilv_plugin_get_port_by_symbol(plugin, sym_out);
    if (!pm || !po) return fail("plugin lacks midi_in or out");
    uint32_t midi_idx = lilv_port_get_index(plugin, pm), out_idx = lilv_port_get_index(plugin, po);

    line *lines = calloc(MAX_LINES, sizeof(line));
    long n_lines = 0, total = 0, longest = 1;
    {
        FILE *f = fopen(script, "r");
        char buf[256];
        if (!f) return fail("cannot read the script");
        while (fgets(buf, sizeof buf, f) && n_lines < MAX_LINES) {
            line *L = &lines[n_lines];
            if (sscanf(buf, "run %ld", &L->n) == 1) {
                L->kind = 'r';
                total += L->n;
                if (L->n > longest) longest = L->n;
            } else if (sscanf(buf, "midi %ld %d %d %d", &L->t, &L->b[0], &L->b[1], &L->b[2]) == 4) {
                L->kind = 'm';
            } else if (sscanf(buf, "port %ld %63s %f", &L->t, L->sym, &L->value) == 3) {
                L->kind = 'p';
            } else {
                continue;
            }
            ++n_lines;
        }
        fclose(f);
    }
    float *audio = calloc((size_t)total + 1, sizeof(float));
    float *scratch = calloc((size_t)longest, sizeof(float));
    LV2_Atom_Sequence *seq = aligned_alloc(64, SEQ_BYTES);
    LV2_URID u_seq = map_uri(NULL, LV2_ATOM__Sequence), u_midi = map_uri(NULL, LV2_MIDI__MidiEvent);

    LilvNode *control_class = lilv_new_uri(world, LV2_CORE__ControlPort);
    for (i = 0; i < (int)n_ports; ++i)
        if (lilv_port_is_a(plugin, lilv_plugin_get_port_by_index(plugin, (uint32_t)i), control_class))
            lilv_instance_connect_port(inst, (uint32_t)i, &controls[i]);
    lilv_instance_connect_port(inst, midi_idx, seq);
    lilv_instance_activate(inst);

    long pos = 0, li;
    for (li = 0; li < n_lines; ++li) {
        long n, lj;
        if (lines[li].kind != 'r') continue;
        n = lines[li].n;
        seq->atom.type = u_seq;
        seq->atom.size = sizeof(LV2_Atom_Sequence_Body);
        seq->body.unit = 0;
        seq->body.pad = 0;
        for (lj = 0; lj < n_lines; ++lj) {
            line *L = &lines[lj];
            if (L->kind == 'p' && L->t <= pos && L->t >= 0) {
                LilvNode *sn = lilv_new_string(world, L->sym);
                const LilvPort *pp = lilv_plugin_get_port_by_symbol(plugin, sn);
                lilv_node_free(sn);
                if (!pp) return fail("unknown port symbol in the script");
                controls[lilv_port_get_index(plugin, pp)] = L->value;
                L->t = -1;     /* applied */
            } else if (L->kind == 'm' && L->t >= pos && L->t < pos + n) {
                struct { LV2_Atom_Event ev; uint8_t msg[4]; } e;
                e.ev.time.frames = L->t - pos;
                e.ev.body.size = 3;
                e.ev.body.type = u_midi;
                e.msg[0] = (uint8_t)L->b[0];
                e.msg[1] = (uint8_t)L->b[1];
                e.msg[2] = (uint8_t)L->b[2];
                if (!lv2_atom_sequence_append_event(seq, SEQ_BYTES - sizeof(LV2_Atom), &e.ev))
                    return fail("event buffer full");
            }
        }
        lilv_instance_connect_port(inst, out_idx, n > 0 ? audio + pos : scratch);
        lilv_instance_run(inst, (uint32_t)n);
        pos += n;
    }
    {
        FILE *f = fopen(out_path, "wb");
        if (!f || fwrite(audio, sizeof(float), (size_t)total, f) != (size_t)total) return fail("cannot write OUT");
        fclose(f);
    }
    if (save) {
        LilvState *st = lilv_state_new_from_instance(plugin, inst, &map, NULL, NULL, NULL, NULL, NULL, NULL,
                                                     LV2_STATE_IS_POD | LV2_STATE_IS_PORTABLE, state_features);
        char *text;
        FILE *f;
        if (!st) return fail("the plugin saved no state");
        text = lilv_state_to_string(world, &map, &unmap, st, "urn:sheafsynth:test:state", NULL);
        f = fopen(save, "w");
        if (!text || !f || fputs(text, f) < 0) return fail("cannot write the state file");
        fclose(f);
        lilv_free(text);
        lilv_state_free(st);
    }
    lilv_instance_deactivate(inst);
    lilv_instance_free(inst);
    lilv_world_free(world);
    return 0;
}
