/* tg_config.h - build options of the tinygen runtime kernels.
 *
 * The code generator writes a copy of this file into each emitted tree with the values that
 * tree needs; this default is what the runtime's own tests build with.
 *   TG_WITH_FLOAT_REQUANT  1: kernels include the float32 requantization path
 *   TG_KERNELS_PORTABLE    1: plain C kernels on every core (--kernels portable)
 *   TG_OP_BEGIN(i)/TG_OP_END(i)  hooks around op i in <prefix>_run (measurement builds)
 */
#ifndef TG_CONFIG_H
#define TG_CONFIG_H

#ifndef TG_WITH_FLOAT_REQUANT
#define TG_WITH_FLOAT_REQUANT 0
#endif

#ifndef TG_KERNELS_PORTABLE
#define TG_KERNELS_PORTABLE 0
#endif

#ifndef TG_OP_BEGIN
#define TG_OP_BEGIN(i) ((void)0)
#endif

#ifndef TG_OP_END
#define TG_OP_END(i) ((void)0)
#endif

#endif /* TG_CONFIG_H */
