/* The public calls: check the C arguments, take the GIL, call the bridge, fill C structs. */
#include "pnl_internal.h"

#include <math.h>
#include <stdarg.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

static int bad_timeout(const char *call, double timeout_s)
{
    if (!(isfinite(timeout_s) && timeout_s > 0))
        return pnl_fail(PNL_INVALID_ARGUMENT, "%s: timeout_s: expected a finite number of seconds > 0, got %g",
                        call, timeout_s);
    return PNL_OK;
}

static void copy_text(char *dest, size_t capacity, const char *src)
{
    snprintf(dest, capacity, "%s", src != NULL ? src : "");
}

/* ---- connection ------------------------------------------------------------------------ */

int pnl_connect(const char *target, double timeout_s, pnl_connection **out)
{
    pnl_clear_error();
    if (out == NULL)
        return pnl_fail(PNL_INVALID_ARGUMENT, "pnl_connect: out: expected a pointer to a pnl_connection*, got NULL");
    *out = NULL;
    if (target == NULL || target[0] == '\0')
        return pnl_fail(PNL_INVALID_ARGUMENT, "pnl_connect: target: expected \"host:port\", got %s",
                        target == NULL ? "NULL" : "an empty string");
    int status = bad_timeout("pnl_connect", timeout_s);
    if (status != PNL_OK || (status = pnl_ensure_started()) != PNL_OK)
        return status;
    pnl_connection *connection = calloc(1, sizeof *connection);
    if (connection == NULL)
        return pnl_fail(PNL_INTERNAL, "pnl_connect: out of memory");
    PyGILState_STATE gil = PyGILState_Ensure();
    connection->bridge = PyObject_CallMethod(pnl_bridge_module(), "connect", "sd", target, timeout_s);
    if (connection->bridge == NULL)
        status = pnl_fail_from_python("pnl_connect");
    PyGILState_Release(gil);
    if (status != PNL_OK)
        free(connection);
    else
        *out = connection;
    return status;
}

int pnl_disconnect(pnl_connection *connection)
{
    pnl_clear_error();
    if (connection == NULL)
        return pnl_fail(PNL_INVALID_ARGUMENT, "pnl_disconnect: connection: got NULL");
    int status = PNL_OK;
    PyGILState_STATE gil = PyGILState_Ensure();
    PyObject *result = PyObject_CallMethod(connection->bridge, "close", NULL);
    if (result == NULL)
        status = pnl_fail_from_python("pnl_disconnect");
    Py_XDECREF(result);
    Py_DECREF(connection->bridge);
    PyGILState_Release(gil);
    free(connection);
    return status;
}

/* ---- runs ------------------------------------------------------------------------------- */

static int make_run(const char *call, pnl_connection *connection, const char *method, const char *argument,
                    const char *argument_name, pnl_run **out)
{
    pnl_clear_error();
    if (out == NULL)
        return pnl_fail(PNL_INVALID_ARGUMENT, "%s: out: expected a pointer to a pnl_run*, got NULL", call);
    *out = NULL;
    if (connection == NULL)
        return pnl_fail(PNL_INVALID_ARGUMENT, "%s: connection: got NULL (call pnl_connect first)", call);
    if (argument == NULL)
        return pnl_fail(PNL_INVALID_ARGUMENT, "%s: %s: got NULL", call, argument_name);
    pnl_run *run = calloc(1, sizeof *run);
    if (run == NULL)
        return pnl_fail(PNL_INTERNAL, "%s: out of memory", call);
    int status = PNL_OK;
    PyGILState_STATE gil = PyGILState_Ensure();
    run->bridge = PyObject_CallMethod(connection->bridge, method, "s", argument);
    PyObject *run_id = run->bridge != NULL ? PyObject_GetAttrString(run->bridge, "run_id") : NULL;
    const char *utf8 = run_id != NULL ? PyUnicode_AsUTF8(run_id) : NULL;
    if (utf8 == NULL)
        status = pnl_fail_from_python(call);
    else
        copy_text(run->run_id, sizeof run->run_id, utf8);
    Py_XDECREF(run_id);
    if (status != PNL_OK)
        Py_CLEAR(run->bridge);
    PyGILState_Release(gil);
    if (status != PNL_OK)
        free(run);
    else
        *out = run;
    return status;
}

int pnl_open_run(pnl_connection *connection, const char *spec, pnl_run **out)
{
    return make_run("pnl_open_run", connection, "open_run", spec, "spec", out);
}

int pnl_attach_run(pnl_connection *connection, const char *run_id, pnl_run **out)
{
    return make_run("pnl_attach_run", connection, "attach_run", run_id, "run_id", out);
}

int pnl_run_id(pnl_run *run, char *buf, int capacity)
{
    pnl_clear_error();
    if (run == NULL || buf == NULL)
        return pnl_fail(PNL_INVALID_ARGUMENT, "pnl_run_id: %s: got NULL", run == NULL ? "run" : "buf");
    int needed = (int)strlen(run->run_id) + 1;
    if (capacity < needed)
        return pnl_fail(PNL_INVALID_ARGUMENT, "pnl_run_id: capacity: the id needs %d bytes, got %d", needed, capacity);
    memcpy(buf, run->run_id, (size_t)needed);
    return PNL_OK;
}

/* Call a bridge method returning None; status. */
static int call_none(const char *call, pnl_run *run, const char *method, const char *format, ...)
{
    if (run == NULL)
        return pnl_fail(PNL_INVALID_ARGUMENT, "%s: run: got NULL", call);
    int status = PNL_OK;
    PyGILState_STATE gil = PyGILState_Ensure();
    va_list args;
    va_start(args, format);
    PyObject *callable = PyObject_GetAttrString(run->bridge, method);
    PyObject *arguments = callable != NULL ? Py_VaBuildValue(format, args) : NULL;
    va_end(args);
    PyObject *result = arguments != NULL ? PyObject_CallObject(callable, arguments) : NULL;
    if (result == NULL)
        status = pnl_fail_from_python(call);
    Py_XDECREF(result);
    Py_XDECREF(arguments);
    Py_XDECREF(callable);
    PyGILState_Release(gil);
    return status;
}

int pnl_run_close(pnl_run *run, int close_on_server, double timeout_s)
{
    pnl_clear_error();
    if (run == NULL)
        return pnl_fail(PNL_INVALID_ARGUMENT, "pnl_run_close: run: got NULL");
    int status = bad_timeout("pnl_run_close", timeout_s);
    if (status == PNL_OK)
        status = call_none("pnl_run_close", run, "close", "(id)", close_on_server != 0, timeout_s);
    PyGILState_STATE gil = PyGILState_Ensure();
    Py_DECREF(run->bridge);
    PyGILState_Release(gil);
    free(run);
    return status;
}

int pnl_flush(pnl_run *run, double timeout_s)
{
    pnl_clear_error();
    int status = bad_timeout("pnl_flush", timeout_s);
    return status != PNL_OK ? status : call_none("pnl_flush", run, "flush", "(d)", timeout_s);
}

int pnl_wait_surfaces(pnl_run *run, long long iteration, double timeout_s)
{
    pnl_clear_error();
    int status = bad_timeout("pnl_wait_surfaces", timeout_s);
    return status != PNL_OK ? status : call_none("pnl_wait_surfaces", run, "wait_surfaces", "(Ld)", iteration, timeout_s);
}
