"""Stand-ins for what Blender passes to panels and modal operators.

Module-mode Blender never draws a panel and never enters ``invoke`` / ``modal``
(docs/platform.md, "What does not work in module mode"). These stand-ins let
the tests call those methods themselves:

- :class:`Layout` records what a ``draw`` asks for and checks every name
  against real Blender's RNA: the layout function and its keywords exist
  (``UILayout.bl_rna.functions``), icons are Blender icons, ``prop(data, name)``
  names a property of ``data``, ``operator(idname)`` a registered operator whose
  poll runs, ``template_list`` a registered list over a collection (and it draws
  each item through the list's ``draw_item``);
- :class:`StandIn` is a ``self`` carrying a Blender class's attributes and
  methods without being a Blender instance;
- :class:`Context` is the real context with some members replaced (region,
  window manager, screen);
- :class:`WindowManager` records progress and timer calls;
- :class:`Workspace` records the status bar's text.
"""

import inspect
import types

import bpy

UILAYOUT = bpy.types.UILayout.bl_rna
ICONS = frozenset(UILAYOUT.functions["label"].parameters["icon"].enum_items.keys())
NESTED = ("row", "column", "box", "split", "grid_flow", "column_flow")


class StandIn:
    """A ``self`` for ``cls``'s methods: class attributes, properties and
    functions of ``cls`` bound to the stand-in; other names from ``fallback``
    (a real instance, e.g. the add-on's preferences, for their RNA properties)."""

    def __init__(self, cls, fallback=None, **attributes):
        self.__dict__.update(_cls=cls, _fallback=fallback, reports=[], **attributes)

    def report(self, kind, message):
        self.reports.append((set(kind), message))

    def __getattr__(self, name):
        cls, fallback = self.__dict__["_cls"], self.__dict__["_fallback"]
        python_defined = any(name in vars(c) for c in cls.__mro__
                             if not c.__module__.startswith("bpy"))
        if fallback is not None and not python_defined:
            return getattr(fallback, name)
        static = inspect.getattr_static(cls, name)
        if isinstance(static, property):
            return static.fget(self)
        if isinstance(static, (classmethod, staticmethod)):
            return getattr(cls, name)
        if inspect.isfunction(static):
            return types.MethodType(static, self)
        return static


class Context:
    """The real ``bpy.context`` with the given members replaced."""

    def __init__(self, **members):
        self.__dict__.update(members)

    def __getattr__(self, name):
        return getattr(bpy.context, name)


class Region:
    def __init__(self, width):
        self.width = width


class Area:
    def __init__(self, kind):
        self.type = kind
        self.redraws = 0

    def tag_redraw(self):
        self.redraws += 1


class Screen:
    def __init__(self):
        self.areas = [Area('VIEW_3D'), Area('PROPERTIES')]


class WindowManager:
    """Records progress and timers; ``modal_handler_add`` keeps the operator."""

    def __init__(self):
        self.calls = []
        self.timers = set()
        self.handlers = []

    def progress_begin(self, low, high):
        self.calls.append(("begin", low, high))

    def progress_update(self, value):
        assert 0 <= value <= 100
        self.calls.append(("update", value))

    def progress_end(self):
        self.calls.append(("end",))

    def event_timer_add(self, step, window=None):
        timer = object()
        self.timers.add(timer)
        return timer

    def event_timer_remove(self, timer):
        self.timers.remove(timer)  # KeyError: a timer removed twice or never added

    def modal_handler_add(self, operator):
        self.handlers.append(operator)
        return True


class Workspace:
    """Records what the status bar is asked to show (None: Blender's own text again)."""

    def __init__(self):
        self.status = []

    def status_text_set(self, text):
        assert text is None or isinstance(text, str)
        self.status.append(text)


class Event:
    def __init__(self, kind):
        self.type = kind
        self.value = 'PRESS'


class OperatorProperties:
    """What ``layout.operator`` returns: setting a name the operator lacks fails."""

    def __init__(self, idname, rna):
        self.__dict__.update(_idname=idname, _rna=rna)

    def __setattr__(self, name, value):
        assert name in self._rna.properties, f"operator {self._idname} has no property {name!r}"
        self.__dict__[name] = value


def _bind(function, args, kwargs):
    """Keyword arguments of a UILayout call, checked against its RNA function."""
    assert function in UILAYOUT.functions, f"UILayout has no function {function!r}"
    params = UILAYOUT.functions[function].parameters
    names = [p.identifier for p in params if not p.is_output]
    assert len(args) <= len(names), f"{function}: too many arguments {args!r}"
    bound = dict(zip(names, args))
    for key, value in kwargs.items():
        assert key in names, f"UILayout.{function} has no parameter {key!r}"
        assert key not in bound, f"UILayout.{function}: {key!r} given twice"
        bound[key] = value
    missing = [p.identifier for p in params
               if p.is_required and not p.is_output and p.identifier not in bound]
    assert not missing, f"UILayout.{function}: missing {missing}"
    icon = bound.get("icon")
    assert icon is None or icon in ICONS, f"UILayout.{function}: unknown icon {icon!r}"
    return bound


class Layout:
    """A recording stand-in for ``bpy.types.UILayout`` (module docstring).

    ``log`` is shared by a layout and every layout nested in it: a list of
    ``(function, bound keyword arguments)``.
    """

    def __init__(self, context, log=None):
        self.__dict__.update(_context=context, log=[] if log is None else log)

    def __setattr__(self, name, value):
        assert name in UILAYOUT.properties, f"UILayout has no property {name!r}"
        self.__dict__[name] = value
        self.log.append(("set", {name: value}))

    def __getattr__(self, name):
        if name.startswith("__"):
            raise AttributeError(name)
        def call(*args, **kwargs):
            bound = _bind(name, args, kwargs)
            self.log.append((name, bound))
            return Layout(self._context, self.log) if name in NESTED else None
        return call

    def panel(self, *args, **kwargs):
        self.log.append(("panel", _bind("panel", args, kwargs)))
        return Layout(self._context, self.log), Layout(self._context, self.log)

    def prop(self, *args, **kwargs):
        bound = _bind("prop", args, kwargs)
        data, name = bound["data"], bound["property"]
        assert name in data.bl_rna.properties, (
            f"prop: {type(data).__name__} has no property {name!r}")
        self.log.append(("prop", bound))

    def operator(self, *args, **kwargs):
        bound = _bind("operator", args, kwargs)
        group, _, name = bound["operator"].partition(".")
        op = getattr(getattr(bpy.ops, group), name)
        rna = op.get_rna_type()  # KeyError for an operator that is not registered
        op.poll()  # its poll runs in this context
        self.log.append(("operator", bound))
        return OperatorProperties(bound["operator"], rna)

    def template_list(self, *args, **kwargs):
        bound = _bind("template_list", args, kwargs)
        cls = getattr(bpy.types, bound["listtype_name"], None)
        assert cls is not None and issubclass(cls, bpy.types.UIList), (
            f"template_list: no registered list {bound['listtype_name']!r}")
        data, name = bound["dataptr"], bound["propname"]
        assert data.bl_rna.properties[name].type == 'COLLECTION', f"{name} is not a collection"
        active, active_name = bound["active_dataptr"], bound["active_propname"]
        assert active.bl_rna.properties[active_name].type == 'INT', f"{active_name} is not an index"
        self.log.append(("template_list", bound))
        for index, item in enumerate(getattr(data, name)):
            cls.draw_item(StandIn(cls), self._context, Layout(self._context, self.log), data, item,
                          0, active, active_name, index, 0)

    # ------------------------------------------------------------- reading the log
    def texts(self):
        """Every label's text, in drawing order."""
        return [b.get("text", "") for f, b in self.log if f == "label"]

    def props(self):
        """(RNA type name, property) of every ``prop``."""
        return [(b["data"].bl_rna.identifier, b["property"]) for f, b in self.log if f == "prop"]

    def operators(self):
        return [b["operator"] for f, b in self.log if f == "operator"]
