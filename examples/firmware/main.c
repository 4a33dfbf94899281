/* main.c - the smallest firmware that runs a tinygen model, step by step.
 *
 * Scenario: a 3-axis accelerometer on a pump housing. Fill one window of readings (in g),
 * classify it, print the class and its score. classify() is the driver core shown in the
 * README, written only from the emitted header, so it is right for int8 and uint8 models.
 * Build: make TREE=<emitted tree>   Run on QEMU: make run TREE=<emitted tree>
 * The tree must be emitted with the default --prefix model and --io arena.
 */
#include <stddef.h>
#include <stdint.h>

#include "model.h"       /* from the emitted tree: types, sizes, scales and the entry points */

void app_print(const char *text);   /* startup.c: console (semihosting here) */

/* Stand-in for the sensor driver: reading i of the window, in g. For the pump model the
 * input is [128 samples][3 axes], so i = 3 * sample + axis. A triangle wave per axis
 * keeps it deterministic and free of libm. */
static float app_sensor_reading(uint32_t i)
{
    const uint32_t period = 40u;                        /* 25 Hz at 1 kHz sampling */
    uint32_t phase = (i / 3u + 10u * (i % 3u)) % period;
    float tri = (phase < period / 2u) ? (float)phase : (float)(period - phase);
    return 0.04f * tri - 0.4f;                          /* -0.4 g .. +0.4 g */
}

static void app_print_int(const char *label, int32_t value, const char *unit)
{
    char text[16];
    int pos = (int)sizeof text - 1;
    uint32_t magnitude = value < 0 ? 0u - (uint32_t)value : (uint32_t)value;
    text[pos] = '\0';
    do {
        text[--pos] = (char)('0' + magnitude % 10u);
        magnitude /= 10u;
    } while (magnitude != 0u && pos > 1);
    if (value < 0) {
        text[--pos] = '-';
    }
    app_print(label);
    app_print(&text[pos]);
    app_print(unit);
}

/* One window of real values (MODEL_INPUT_0_SIZE, storage order) in, the class index out. */
int classify(const float *window)
{
    model_input_0_t *in = model_input(NULL, 0);           /* input 0, inside the arena */
    const model_output_0_t *score = model_output(NULL, 0);
    uint32_t i, best = 0u;

    for (i = 0u; i < MODEL_INPUT_0_SIZE; ++i) {
        in[i] = model_quantize_input_0(window[i]);
    }
    if (model_run(NULL, NULL, NULL) != 0) {               /* NULL: the arena in model.c */
        return -1;
    }
    for (i = 1u; i < MODEL_OUTPUT_0_SIZE; ++i) {          /* quantized order = real order */
        if (score[i] > score[best]) {
            best = i;
        }
    }
    return (int)best;
}

int main(void)
{
    static float window[MODEL_INPUT_0_SIZE];
    const model_output_0_t *score = model_output(NULL, 0);
    uint32_t i;
    int best;

    /* 1. One window of sensor readings, as real numbers (storage order). */
    for (i = 0u; i < MODEL_INPUT_0_SIZE; ++i) {
        window[i] = app_sensor_reading(i);
    }

    /* 2. Quantize, run, pick the class: the model's static arena (NULL) is placed in
     *    section .arena by the Makefile; no heap, only the arena and a little stack. */
    best = classify(window);
    if (best < 0) {
        app_print("model_run failed: misaligned arena\n");
        return 1;
    }

    /* 3. The winning score as a real number: (q - zero_point) * scale. */
    app_print_int("arena: ", (int32_t)MODEL_ARENA_BYTES, " bytes\n");
    app_print_int("class: ", (int32_t)best, "\n");
    app_print_int("score: ", (int32_t)(model_dequantize_output_0(score[best]) * 1000.0f),
                  " milli\n");
    return 0;
}
