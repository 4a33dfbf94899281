/* main.c - the smallest firmware that runs a tinygen model, step by step.
 *
 * Scenario: a 3-axis accelerometer on a pump housing. Fill one window of readings (in g),
 * quantize it into the model's input, run the model, read the class scores back.
 * Build: make TREE=<emitted tree>   Run on QEMU: make run TREE=<emitted tree>
 * The tree must be emitted with the default --prefix model and --io arena.
 */
#include <stddef.h>
#include <stdint.h>

#include "model.h"       /* from the emitted tree: sizes, scales and the entry points */

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

int main(void)
{
    float window[MODEL_INPUT_0_SIZE];
    float scores[MODEL_OUTPUT_0_SIZE];
    uint32_t i;
    uint32_t best = 0u;
    int status;

    /* 1. One window of sensor readings, as real numbers. */
    for (i = 0u; i < MODEL_INPUT_0_SIZE; ++i) {
        window[i] = app_sensor_reading(i);
    }

    /* 2. Quantize into the input tensor. With --io arena the input lives inside the arena;
     *    model_input(NULL, 0) points at it (NULL = the model's own static arena, which the
     *    Makefile places in section .arena). Per element, as ONNX QuantizeLinear does:
     *    q = clamp(round_half_even(x / MODEL_INPUT_0_SCALE) + MODEL_INPUT_0_ZERO_POINT). */
    model_quantize_input(0, window, model_input(NULL, 0), MODEL_INPUT_0_SIZE);

    /* 3. Run. No heap: all the memory it touches is the arena and a little stack. */
    status = model_run(NULL, NULL, NULL);
    if (status != 0) {
        app_print_int("model_run failed: ", status, "\n");
        return 1;
    }

    /* 4. Read the output back as real numbers: (q - zero_point) * scale. */
    model_dequantize_output(0, model_output(NULL, 0), scores, MODEL_OUTPUT_0_SIZE);
    for (i = 1u; i < MODEL_OUTPUT_0_SIZE; ++i) {
        if (scores[i] > scores[best]) {
            best = i;
        }
    }
    app_print_int("arena: ", (int32_t)MODEL_ARENA_BYTES, " bytes\n");
    app_print_int("class: ", (int32_t)best, "\n");
    app_print_int("score: ", (int32_t)(scores[best] * 1000.0f), " milli\n");
    return 0;
}
