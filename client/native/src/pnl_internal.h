/* Shared between the two halves of libpenumbra_link: the embedded-interpreter runtime
 * (pnl_runtime.c) and the public calls (pnl_calls.c). Not installed. */
#ifndef PNL_INTERNAL_H
#define PNL_INTERNAL_H

#define PY_SSIZE_T_CLEAN
#include <Python.h>

#include "penumbra_link.h"

struct pnl_connection {
    PyObject *bridge; /* penumbra_shim._native_bridge.Connection */
};

struct pnl_run {
    PyObject *bridge; /* penumbra_shim._native_bridge.Run (asked for the run id: it may come later) */
};

/* The highest value of enum pnl_status (the table of names in pnl_runtime.c ends there). */
#define PNL_STATUS_LAST PNL_PERMISSION_DENIED

/* Record status and a printf-style message as this thread's last error; returns status. */
int pnl_fail(int status, const char *format, ...) __attribute__((format(printf, 2, 3)));
/* Forget this thread's last error (every public call starts with it). */
void pnl_clear_error(void);
/* Start Python and import the bridge once; PNL_OK or the (remembered) failure. */
int pnl_ensure_started(void);
/* The imported penumbra_shim._native_bridge module (borrowed; valid after pnl_ensure_started). */
PyObject *pnl_bridge_module(void);
/* With the GIL held and a Python exception set: clear it, record it as the last error (its
 * status from the bridge's BridgeError.status, else PNL_INTERNAL) and return the status. */
int pnl_fail_from_python(const char *call);

#endif
