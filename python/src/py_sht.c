/* placeholder */
#include "pyclef.h"
PyMethodDef pyclef_sht_methods[] = {{NULL, NULL, 0, NULL}};
int pyclef_sht_register(PyObject *module) { (void)module; return 0; }
