/* The embedded interpreter: start-up (once per process), the bridge module, status codes and
 * the per-thread last-error message. Nothing here exits or aborts the process. */
#include "pnl_internal.h"

#include <pthread.h>
#include <stdarg.h>
#include <stdio.h>
#include <string.h>
#include <unistd.h>

#ifndef PNL_DEFAULT_PYTHON
#define PNL_DEFAULT_PYTHON "python3"
#endif

#define PNL_MESSAGE_CAPACITY 4096

static _Thread_local char last_error[PNL_MESSAGE_CAPACITY];

static pthread_once_t start_once = PTHREAD_ONCE_INIT;
static int start_status = PNL_INTERNAL;
static char start_message[PNL_MESSAGE_CAPACITY];
static PyObject *bridge_module = NULL; /* owned for the life of the process */

static const char *const status_names[] = {
    "PNL_OK", "PNL_INVALID_ARGUMENT", "PNL_UNAVAILABLE", "PNL_TIMEOUT", "PNL_NOT_FOUND",
    "PNL_FAILED_PRECONDITION", "PNL_RESOURCE_EXHAUSTED", "PNL_REFUSED", "PNL_UNIMPLEMENTED",
    "PNL_PYTHON_ERROR", "PNL_INTERNAL", "PNL_PENDING", "PNL_UNAUTHENTICATED", "PNL_PERMISSION_DENIED",
};
_Static_assert(sizeof status_names / sizeof status_names[0] == PNL_STATUS_LAST + 1,
               "one name per pnl_status value");

const char *pnl_status_name(int status)
{
    if (status < 0 || status > PNL_STATUS_LAST)
        return "PNL_UNKNOWN_STATUS";
    return status_names[status];
}

const char *pnl_default_python(void) { return PNL_DEFAULT_PYTHON; }

const char *pnl_last_error(void) { return last_error; }

int pnl_last_error_copy(char *buf, int capacity)
{
    int length = (int)strlen(last_error);
    if (buf != NULL && capacity > 0) {
        int n = length < capacity - 1 ? length : capacity - 1;
        memcpy(buf, last_error, (size_t)n);
        buf[n] = '\0';
    }
    return length;
}

void pnl_clear_error(void) { last_error[0] = '\0'; }

int pnl_fail(int status, const char *format, ...)
{
    va_list args;
    va_start(args, format);
    vsnprintf(last_error, sizeof last_error, format, args);
    va_end(args);
    return status;
}

/* str(obj) into buf; "?" when even that fails (the error is cleared). */
static void describe(PyObject *obj, char *buf, size_t capacity)
{
    PyObject *text = obj != NULL ? PyObject_Str(obj) : NULL;
    const char *utf8 = text != NULL ? PyUnicode_AsUTF8(text) : NULL;
    if (utf8 == NULL) {
        PyErr_Clear();
        utf8 = "?";
    }
    snprintf(buf, capacity, "%s", utf8);
    Py_XDECREF(text);
}

int pnl_fail_from_python(const char *call)
{
    PyObject *type = NULL, *value = NULL, *traceback = NULL;
    PyErr_Fetch(&type, &value, &traceback);
    if (type == NULL)
        return pnl_fail(PNL_INTERNAL, "%s: failed without a Python exception", call);
    PyErr_NormalizeException(&type, &value, &traceback);
    int status = PNL_INTERNAL;
    PyObject *code = value != NULL ? PyObject_GetAttrString(value, "status") : NULL;
    if (code != NULL && PyLong_Check(code)) {
        long v = PyLong_AsLong(code);
        if (v > PNL_OK && v <= PNL_STATUS_LAST && v != PNL_PENDING) /* PENDING is never an error */
            status = (int)v;
    }
    PyErr_Clear(); /* a missing attribute is not an error here */
    Py_XDECREF(code);
    char message[PNL_MESSAGE_CAPACITY - 256];
    describe(value, message, sizeof message);
    if (status == PNL_INTERNAL) {
        const char *name = ((PyTypeObject *)type)->tp_name;
        pnl_fail(status, "%s: %s: %s", call, name, message);
    } else {
        pnl_fail(status, "%s: %s", call, message);
    }
    /* Dropping the exception frees its frames, and with them any view of the caller's memory. */
    Py_XDECREF(type);
    Py_XDECREF(value);
    Py_XDECREF(traceback);
    return status;
}

static void start_failed(int status, const char *format, ...) __attribute__((format(printf, 2, 3)));
static void start_failed(int status, const char *format, ...)
{
    va_list args;
    va_start(args, format);
    vsnprintf(start_message, sizeof start_message, format, args);
    va_end(args);
    start_status = status;
}

/* Python's error text after a failed import, with sys.executable and sys.path to help. */
static void import_failed(const char *python)
{
    PyObject *type = NULL, *value = NULL, *traceback = NULL;
    PyErr_Fetch(&type, &value, &traceback);
    PyErr_NormalizeException(&type, &value, &traceback);
    char message[1024], executable[512], path[1536];
    describe(value, message, sizeof message);
    describe(PySys_GetObject("executable"), executable, sizeof executable);
    describe(PySys_GetObject("path"), path, sizeof path);
    start_failed(PNL_PYTHON_ERROR,
                 "cannot import penumbra_shim._native_bridge with python %s (sys.executable %s): %s; "
                 "set PENUMBRA_PYTHON to a python whose site-packages has penumbra_shim and its "
                 "dependencies grpcio, protobuf, numpy (sys.path %s)",
                 python, executable, message, path);
    Py_XDECREF(type);
    Py_XDECREF(value);
    Py_XDECREF(traceback);
}

static void start_python(void)
{
    const char *python = getenv("PENUMBRA_PYTHON");
    if (python == NULL || python[0] == '\0')
        python = PNL_DEFAULT_PYTHON;
    int started_here = 0;
    if (!Py_IsInitialized()) {
        if (access(python, X_OK) != 0) {
            start_failed(PNL_PYTHON_ERROR,
                         "PENUMBRA_PYTHON: %s is not an executable python (the built-in default is %s); "
                         "set PENUMBRA_PYTHON to the python whose site-packages has penumbra_shim",
                         python, PNL_DEFAULT_PYTHON);
            return;
        }
        PyConfig config;
        PyConfig_InitPythonConfig(&config);
        config.install_signal_handlers = 0; /* the host program owns its signals */
        config.parse_argv = 0;
        /* The executable's location is how Python finds a virtual environment's packages. */
        PyStatus status = PyConfig_SetBytesString(&config, &config.executable, python);
        if (!PyStatus_Exception(status))
            status = Py_InitializeFromConfig(&config);
        PyConfig_Clear(&config);
        if (PyStatus_Exception(status)) {
            start_failed(PNL_PYTHON_ERROR, "cannot start the embedded Python (%s): %s%s%s", python,
                         status.func != NULL ? status.func : "", status.func != NULL ? ": " : "",
                         status.err_msg != NULL ? status.err_msg : "unknown error");
            return;
        }
        started_here = 1;
    }
    PyGILState_STATE gil = PyGILState_Ensure();
    bridge_module = PyImport_ImportModule("penumbra_shim._native_bridge");
    if (bridge_module == NULL)
        import_failed(python);
    else
        start_status = PNL_OK;
    PyGILState_Release(gil);
    if (started_here)
        (void)PyEval_SaveThread(); /* free the GIL for the shim's threads; every call re-takes it */
}

int pnl_ensure_started(void)
{
    pthread_once(&start_once, start_python);
    if (start_status != PNL_OK)
        return pnl_fail(start_status, "%s", start_message);
    return PNL_OK;
}

int pnl_init(void)
{
    pnl_clear_error();
    return pnl_ensure_started();
}

PyObject *pnl_bridge_module(void) { return bridge_module; }
